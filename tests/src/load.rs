//! The fan-out load driver shared by `tests/tests/load.rs` (a short debug run in the normal
//! suite) and `loadgen --slow-subscribers N` (the release figures of `docs/performance.md`).
//!
//! It starts the real binary on an invented site ("Cormorant Flats": N sensors, alternately a
//! polar radar and a cartesian camera, each in its own 10 km cell with its own ingest token,
//! plus a beacon sensor, see below), opens one ingest connection per sensor that sends batches
//! of a few circling objects plus uniform clutter as fast as acknowledgements allow (a fixed
//! number in flight), and subscribes fast frame consumers (read every frame) and deliberately
//! slow ones (sleep between reads, small socket receive buffer, like a consumer on a thin
//! link). It runs two phases on the same server: a **baseline** with only the fast
//! subscribers, then a **loaded** phase with the slow ones added; comparing the two ingest
//! rates shows whether a slow consumer slowed ingest (the broadcast fan-out promises it never
//! does: a lagging subscriber skips frames and is told `{"skipped": N}`).
//!
//! At the end it keeps an **exact account** ([`LoadReport::mismatches`]): per sensor, the set of
//! acknowledged seqs must equal the set of seqs in the frames every fast subscriber received
//! (which must hold no skip marker), and the server's counters, scraped from `/metrics` with a
//! real Prometheus parser, must agree (`batches_acked`, `batches_received`, `frames`,
//! `frames_skipped`); every slow subscriber's frames plus the `N`s of its skip markers must add
//! up to every frame published while it was connected. The peak resident memory of the server
//! (`VmHWM` of `/proc/PID/status`) is reported.
//!
//! Design choice: batches are stamped with one monotonic clock, and connections race each
//! other, so the site has a reorder window (`tracker.reorder_window`) and the tracker holds
//! the newest scans until the window has passed. To see the frame of every acknowledged batch
//! without stopping the server, each phase ends with one empty batch from the beacon sensor
//! stamped a window ahead: it releases every held scan and is itself held, until the next
//! phase releases it or shutdown flushes it.

use std::collections::{BTreeMap, BTreeSet, HashMap, VecDeque};
use std::path::Path;
use std::sync::atomic::{AtomicBool, AtomicU64, Ordering};
use std::sync::{Arc, Mutex};
use std::time::{Duration, Instant};

use anyhow::{Context, Result, anyhow, bail};
use futures_util::{SinkExt, StreamExt};
use tokio_tungstenite::tungstenite::Message;
use tokio_tungstenite::tungstenite::client::IntoClientRequest;

use crate::{Server, WAIT, sample, scrape, temp_dir, write_file, ws_connect};

/// Id of the beacon sensor that ends each phase (see the module doc).
pub const BEACON: &str = "flats-beacon";
/// Token of the beacon sensor.
pub const BEACON_TOKEN: &str = "flats-beacon-token-7d21c0e9";
/// Read token of the load site (frames).
pub const LOAD_READ_TOKEN: &str = "flats-read-token-3a94f6b2";
/// Side of each sensor's square cell, m; cells are spaced twice this apart along x.
const CELL: f64 = 10_000.0;
/// Range of the polar sensors (they sit at their cell's centre), m.
const RADAR_RANGE: f64 = 5_000.0;
/// Speed of the circling objects, m/s.
const SPEED: f64 = 8.0;

/// What to run.
#[derive(Debug, Clone)]
pub struct LoadSpec {
    /// Sensors, each with its own ingest connection and token.
    pub sensors: usize,
    /// Detections per batch: `objects` real ones, the rest uniform clutter.
    pub detections: usize,
    /// Objects per sensor, circling its cell's centre.
    pub objects: usize,
    /// Batches in flight per connection.
    pub window: usize,
    /// Subscribers that read every frame as it comes.
    pub fast_subscribers: usize,
    /// Subscribers that sleep `slow_read` before each read (loaded phase only).
    pub slow_subscribers: usize,
    /// Sleep of a slow subscriber before each read.
    pub slow_read: Duration,
    /// `SO_RCVBUF` of a slow subscriber's socket, bytes (small = a thin link; it also keeps
    /// the kernel from buffering the lag away).
    pub slow_recv_buffer: u32,
    /// Seconds of the baseline phase (fast subscribers only).
    pub baseline_seconds: f64,
    /// Seconds of the loaded phase (fast and slow subscribers).
    pub loaded_seconds: f64,
    /// `tracker.reorder_window`, s.
    pub reorder_window: f64,
    /// `server.limits.frame_buffer`, frames.
    pub frame_buffer: usize,
    /// `server.limits.queue_depth`, batches.
    pub queue_depth: usize,
}

/// Id of load sensor `k`: even ones are polar radars, odd ones cartesian cameras.
pub fn sensor_id(k: usize) -> String {
    if k % 2 == 0 {
        format!("flats-radar-{k:02}")
    } else {
        format!("flats-camera-{k:02}")
    }
}

/// Ingest token of load sensor `k` (invented, at least 16 characters, distinct per sensor).
pub fn sensor_token(k: usize) -> String {
    let mix = (k as u64 + 1).wrapping_mul(0x9e37_79b9_7f4a_7c15) >> 32;
    format!("flats-token-{k:02}-{mix:08x}")
}

fn centre(k: usize) -> (f64, f64) {
    (k as f64 * 2.0 * CELL + CELL / 2.0, CELL / 2.0)
}

/// The site TOML of `spec`.
pub fn site_toml(spec: &LoadSpec) -> String {
    let clutter = (spec.detections.saturating_sub(spec.objects) as f64).max(0.1);
    let mut s = format!(
        "[site]\nname = \"Cormorant Flats\"\n\n[tracker]\nassociation = \"jpda\"\nreorder_window = {:?}\n\n",
        spec.reorder_window
    );
    for k in 0..spec.sensors {
        let (cx, cy) = centre(k);
        let id = sensor_id(k);
        let token = sensor_token(k);
        let geometry = if k % 2 == 0 {
            format!(
                "kind = \"polar\"\nposition = {{ x = {cx:?}, y = {cy:?} }}\n\
                 noise = {{ range = 10.0, bearing_deg = 0.3 }}\nfov = {{ max_range = {RADAR_RANGE:?} }}\n"
            )
        } else {
            let x0 = cx - CELL / 2.0;
            format!(
                "kind = \"cartesian\"\nnoise = {{ sigma = 5.0 }}\n\
                 fov = {{ x_min = {x0:?}, x_max = {:?}, y_min = 0.0, y_max = {CELL:?} }}\n",
                x0 + CELL
            )
        };
        s.push_str(&format!(
            "[[sensor]]\nid = \"{id}\"\n{geometry}detection_probability = 0.9\n\
             clutter_rate = {clutter:?}\nbirth_rate = 0.05\ntoken = \"{token}\"\n\n"
        ));
    }
    // The beacon watches an empty cell west of the others.
    s.push_str(&format!(
        "[[sensor]]\nid = \"{BEACON}\"\nkind = \"cartesian\"\nnoise = {{ sigma = 5.0 }}\n\
         fov = {{ x_min = -20000.0, x_max = -10000.0, y_min = 0.0, y_max = 10000.0 }}\n\
         detection_probability = 0.9\nclutter_rate = 0.1\nbirth_rate = 0.05\ntoken = \"{BEACON_TOKEN}\"\n\n"
    ));
    s.push_str(&format!(
        "[server]\nread_token = \"{LOAD_READ_TOKEN}\"\n\n[server.limits]\nmax_message_bytes = 16777216\n\
         max_detections = {}\nmax_batches_per_second = 100000.0\nmax_connections = 1024\n\
         queue_depth = {}\nframe_buffer = {}\n",
        spec.detections.max(1),
        spec.queue_depth.max(1),
        spec.frame_buffer.max(1)
    ));
    s
}

/// Batch time stamps: UNIX seconds at the start of the run plus a monotonic clock.
#[derive(Debug, Clone, Copy)]
struct Clock {
    base: f64,
    t0: Instant,
}

impl Clock {
    fn new() -> Self {
        let base = std::time::SystemTime::now()
            .duration_since(std::time::UNIX_EPOCH)
            .map_or(0.0, |d| d.as_secs_f64());
        Clock {
            base,
            t0: Instant::now(),
        }
    }

    fn now(&self) -> f64 {
        self.base + self.t0.elapsed().as_secs_f64()
    }

    fn elapsed(&self, t: f64) -> f64 {
        t - self.base
    }
}

/// Batch `seq` of load sensor `k` at `time`: `objects` objects circling the cell's centre
/// (radii spread over 0.8–4.8 km, 8 m/s) and uniform clutter over the field of view.
fn batch_text(spec: &LoadSpec, k: usize, seq: u64, time: f64, elapsed: f64) -> String {
    let (cx, cy) = centre(k);
    let polar = k % 2 == 0;
    let mut state = seq
        .wrapping_mul(6_364_136_223_846_793_005)
        .wrapping_add(k as u64 * 1_442_695_040_888_963_407 + 1);
    let mut rnd = move || {
        state ^= state << 13;
        state ^= state >> 7;
        state ^= state << 17;
        (state >> 11) as f64 / (1u64 << 53) as f64
    };
    let mut out = String::with_capacity(spec.detections * 48 + 96);
    out.push_str(&format!(
        "{{\"sensor\":\"{}\",\"seq\":{seq},\"time\":{time:.6},\"detections\":[",
        sensor_id(k)
    ));
    for i in 0..spec.detections {
        if i > 0 {
            out.push(',');
        }
        if i < spec.objects {
            let r = 800.0 + 4000.0 * i as f64 / spec.objects.max(1) as f64;
            let theta = SPEED / r * elapsed + i as f64;
            let (dx, dy) = (r * theta.sin(), r * theta.cos());
            if polar {
                let bearing = dx.atan2(dy).to_degrees().rem_euclid(360.0);
                out.push_str(&format!(
                    "{{\"range\":{:.2},\"bearing\":{:.4}}}",
                    dx.hypot(dy),
                    bearing % 360.0
                ));
            } else {
                out.push_str(&format!("{{\"x\":{:.2},\"y\":{:.2}}}", cx + dx, cy + dy));
            }
        } else if polar {
            let range = RADAR_RANGE * rnd();
            let bearing = (360.0 * rnd()) % 360.0;
            out.push_str(&format!(
                "{{\"range\":{range:.2},\"bearing\":{bearing:.4}}}"
            ));
        } else {
            let (x, y) = (cx - CELL / 2.0 + CELL * rnd(), CELL * rnd());
            out.push_str(&format!("{{\"x\":{x:.2},\"y\":{y:.2}}}"));
        }
    }
    out.push_str("]}");
    out
}

/// One phase's ingest figures.
#[derive(Debug, Clone, Default)]
pub struct PhaseStats {
    /// From the first send to the last reply, s.
    pub seconds: f64,
    /// Batches acknowledged.
    pub acked: u64,
    /// Batches refused (any code).
    pub rejected: u64,
    /// Send-to-ack times, ms, sorted.
    pub ack_latency_ms: Vec<f64>,
    /// Send-to-frame times at the first fast subscriber, ms, sorted (includes the reorder
    /// window's hold).
    pub frame_latency_ms: Vec<f64>,
}

impl PhaseStats {
    /// Acknowledged batches per second.
    pub fn rate(&self) -> f64 {
        self.acked as f64 / self.seconds.max(1e-9)
    }
}

/// The `p` quantile (0..=1) of sorted `v` (nearest rank), NaN if empty.
pub fn quantile(v: &[f64], p: f64) -> f64 {
    if v.is_empty() {
        return f64::NAN;
    }
    v[((v.len() - 1) as f64 * p).round() as usize]
}

/// What one frame subscriber received.
#[derive(Debug, Clone, Default)]
pub struct SubscriberStats {
    /// Whether it read slowly.
    pub slow: bool,
    /// Frames received.
    pub frames: u64,
    /// Frames received while the load ran (before the slow subscribers were told to drain).
    pub frames_during_load: u64,
    /// Sum of the `N`s of its `{"skipped": N}` markers.
    pub skipped: u64,
    /// Skip markers received.
    pub markers: u64,
}

/// The server's counters at the end of the loaded phase.
#[derive(Debug, Clone, Default)]
pub struct Counters {
    /// `plotweave_batches_acked_total{sensor}` per load sensor.
    pub acked: Vec<u64>,
    /// `plotweave_batches_received_total{sensor}` per load sensor.
    pub received: Vec<u64>,
    /// The beacon's `plotweave_batches_acked_total`.
    pub beacon_acked: u64,
    /// `plotweave_frames_total`.
    pub frames: u64,
    /// `plotweave_frames_skipped_total`.
    pub frames_skipped: u64,
    /// `plotweave_reorder_pending_scans`.
    pub reorder_pending: u64,
}

/// Everything a run found; [`LoadReport::mismatches`] is the exact account.
#[derive(Debug, Clone, Default)]
pub struct LoadReport {
    /// The baseline phase (fast subscribers only).
    pub baseline: PhaseStats,
    /// The loaded phase (slow subscribers added).
    pub loaded: PhaseStats,
    /// Refusals by code over both phases (none expected).
    pub rejections: BTreeMap<String, u64>,
    /// Refusals per load sensor over both phases.
    pub refused: Vec<u64>,
    /// Fast subscribers first, then slow ones.
    pub subscribers: Vec<SubscriberStats>,
    /// Frames published while the slow subscribers were connected.
    pub frames_while_slow_connected: u64,
    /// The server's counters.
    pub counters: Counters,
    /// Peak resident memory of the server, KiB (`VmHWM`).
    pub peak_rss_kib: Option<u64>,
    /// Every way in which the account did not match; empty = exact.
    pub mismatches: Vec<String>,
}

/// What a fast subscriber has seen so far (shared with the orchestrator).
#[derive(Debug, Default)]
struct Seen {
    /// Seqs per sensor index (load sensors, then the beacon).
    seqs: Vec<BTreeSet<u64>>,
    frames: u64,
    repeats: u64,
    skipped: u64,
    markers: u64,
    unknown: u64,
    closed: bool,
}

enum Msg {
    Frame { sensor: String, seq: u64 },
    Skipped(u64),
}

/// Classify a frames message by its head only (a frame's `tracks` can be large).
fn classify(text: &str) -> Result<Msg> {
    if text.starts_with("{\"skipped\":") {
        let v: serde_json::Value = serde_json::from_str(text)?;
        return v["skipped"]
            .as_u64()
            .map(Msg::Skipped)
            .ok_or_else(|| anyhow!("bad skip marker {text}"));
    }
    let head = match text.find(",\"tracks\":") {
        Some(i) => format!("{}}}", &text[..i]),
        None => text.to_string(),
    };
    let v: serde_json::Value =
        serde_json::from_str(&head).with_context(|| format!("frame head is not JSON: {head}"))?;
    match (v["sensor"].as_str(), v["seq"].as_u64()) {
        (Some(s), Some(seq)) => Ok(Msg::Frame {
            sensor: s.to_string(),
            seq,
        }),
        _ => bail!("frame without sensor/seq: {head}"),
    }
}

type Sent = Arc<Mutex<HashMap<(usize, u64), Instant>>>;

async fn fast_subscriber(
    mut ws: crate::Ws,
    index: HashMap<String, usize>,
    seen: Arc<Mutex<Seen>>,
    latency: Option<(Sent, Arc<Mutex<Vec<f64>>>)>,
) -> Result<()> {
    while let Some(m) = ws.next().await {
        let m = match m {
            Ok(m) => m,
            Err(_) => break,
        };
        let text = match m {
            Message::Text(t) => t,
            Message::Close(_) => break,
            _ => continue,
        };
        let now = Instant::now();
        let msg = classify(text.as_str())?;
        let mut s = seen.lock().map_err(|_| anyhow!("poisoned"))?;
        match msg {
            Msg::Skipped(n) => {
                s.skipped += n;
                s.markers += 1;
            }
            Msg::Frame { sensor, seq } => {
                s.frames += 1;
                match index.get(&sensor) {
                    Some(&i) => {
                        if !s.seqs[i].insert(seq) {
                            s.repeats += 1;
                        }
                        if let Some((sent, lat)) = &latency {
                            let t0 = sent.lock().ok().and_then(|mut m| m.remove(&(i, seq)));
                            if let (Some(t0), Ok(mut l)) = (t0, lat.lock()) {
                                l.push((now - t0).as_secs_f64() * 1e3);
                            }
                        }
                    }
                    None => s.unknown += 1,
                }
            }
        }
    }
    if let Ok(mut s) = seen.lock() {
        s.closed = true;
    }
    Ok(())
}

/// Shared with the slow subscribers: `drain` = stop sleeping; `expected` = frames published
/// while they were connected (`u64::MAX` until known).
struct SlowControl {
    drain: AtomicBool,
    expected: AtomicU64,
}

async fn slow_subscriber(
    addr: String,
    spec: LoadSpec,
    control: Arc<SlowControl>,
    ready: tokio::sync::oneshot::Sender<()>,
) -> Result<SubscriberStats> {
    let socket = tokio::net::TcpSocket::new_v4()?;
    socket.set_recv_buffer_size(spec.slow_recv_buffer)?;
    let stream = socket
        .connect(addr.parse().context("server address")?)
        .await?;
    stream.set_nodelay(true)?;
    let mut req = format!("ws://{addr}/v1/frames").into_client_request()?;
    req.headers_mut().insert(
        "authorization",
        format!("Bearer {LOAD_READ_TOKEN}").parse()?,
    );
    let (mut ws, _) = tokio::time::timeout(WAIT, tokio_tungstenite::client_async(req, stream))
        .await
        .map_err(|_| anyhow!("slow subscriber: upgrade timed out"))??;
    let _ = ready.send(());
    let mut st = SubscriberStats {
        slow: true,
        ..SubscriberStats::default()
    };
    let give_up = Instant::now() + Duration::from_secs_f64(spec.loaded_seconds) + 3 * WAIT;
    loop {
        if st.frames + st.skipped >= control.expected.load(Ordering::SeqCst) {
            break;
        }
        let draining = control.drain.load(Ordering::SeqCst);
        if !draining {
            tokio::time::sleep(spec.slow_read).await;
        }
        if Instant::now() > give_up {
            bail!(
                "slow subscriber: gave up with {} frames + {} skipped of {} expected",
                st.frames,
                st.skipped,
                control.expected.load(Ordering::SeqCst)
            );
        }
        let m = match tokio::time::timeout(Duration::from_millis(100), ws.next()).await {
            Err(_) => continue, // nothing yet; look at the control again
            Ok(None) => break,
            Ok(Some(Err(e))) => bail!("slow subscriber: {e}"),
            Ok(Some(Ok(m))) => m,
        };
        match m {
            Message::Text(t) => match classify(t.as_str())? {
                Msg::Skipped(n) => {
                    st.skipped += n;
                    st.markers += 1;
                }
                Msg::Frame { .. } => {
                    st.frames += 1;
                    if !draining {
                        st.frames_during_load += 1;
                    }
                }
            },
            Message::Close(_) => break,
            _ => {}
        }
    }
    let _ = ws.close(None).await;
    Ok(st)
}

struct SenderOut {
    next_seq: u64,
    acked: Vec<u64>,
    rejected: Vec<(u64, String)>,
    ack_latency_ms: Vec<f64>,
}

#[allow(clippy::too_many_arguments)]
async fn sender(
    url: String,
    spec: LoadSpec,
    k: usize,
    mut seq: u64,
    deadline: Instant,
    clock: Clock,
    sent: Sent,
) -> Result<SenderOut> {
    let ws = ws_connect(&url, Some(&sensor_token(k))).await?;
    let (mut tx, mut rx) = ws.split();
    let mut out = SenderOut {
        next_seq: seq,
        acked: Vec::new(),
        rejected: Vec::new(),
        ack_latency_ms: Vec::new(),
    };
    let mut in_flight: VecDeque<(u64, Instant)> = VecDeque::new();
    loop {
        while in_flight.len() < spec.window.max(1) && Instant::now() < deadline {
            let time = clock.now();
            let text = batch_text(&spec, k, seq, time, clock.elapsed(time));
            let t0 = Instant::now();
            if let Ok(mut m) = sent.lock() {
                m.insert((k, seq), t0);
            }
            tx.send(Message::text(text))
                .await
                .with_context(|| format!("{}: send seq {seq}", sensor_id(k)))?;
            in_flight.push_back((seq, t0));
            seq += 1;
        }
        let Some(&(want, t0)) = in_flight.front() else {
            break;
        };
        let reply = match tokio::time::timeout(WAIT, rx.next()).await {
            Err(_) => bail!("{}: no reply to seq {want} within {WAIT:?}", sensor_id(k)),
            Ok(None) | Ok(Some(Err(_))) => {
                bail!(
                    "{}: connection ended before the reply to seq {want}",
                    sensor_id(k)
                )
            }
            Ok(Some(Ok(Message::Text(t)))) => t,
            Ok(Some(Ok(Message::Close(f)))) => {
                bail!(
                    "{}: closed ({f:?}) before the reply to seq {want}",
                    sensor_id(k)
                )
            }
            Ok(Some(Ok(_))) => continue,
        };
        in_flight.pop_front();
        let v: serde_json::Value = serde_json::from_str(reply.as_str())
            .with_context(|| format!("reply is not JSON: {reply}"))?;
        if let Some(a) = v["ack"].as_u64() {
            if a != want {
                bail!(
                    "{}: ack {a} where the reply to seq {want} was due",
                    sensor_id(k)
                );
            }
            out.acked.push(a);
            out.ack_latency_ms.push(t0.elapsed().as_secs_f64() * 1e3);
        } else {
            let code = v["error"]["code"].as_str().unwrap_or("?").to_string();
            out.rejected.push((want, code));
        }
    }
    out.next_seq = seq;
    let _ = tx.send(Message::Close(None)).await;
    Ok(out)
}

/// Run one phase: every load sensor sends for `seconds`.
#[allow(clippy::too_many_arguments)]
async fn phase(
    addr: &str,
    spec: &LoadSpec,
    seconds: f64,
    next_seq: &mut [u64],
    acked: &mut [BTreeSet<u64>],
    refused: &mut [u64],
    rejections: &mut BTreeMap<String, u64>,
    clock: Clock,
    sent: &Sent,
) -> Result<PhaseStats> {
    let start = Instant::now();
    let deadline = start + Duration::from_secs_f64(seconds);
    let mut tasks = Vec::new();
    for (k, &seq) in next_seq.iter().enumerate() {
        tasks.push(tokio::spawn(sender(
            format!("ws://{addr}/v1/ingest"),
            spec.clone(),
            k,
            seq,
            deadline,
            clock,
            sent.clone(),
        )));
    }
    let mut stats = PhaseStats::default();
    for (k, t) in tasks.into_iter().enumerate() {
        let out = t.await.context("sender task")??;
        next_seq[k] = out.next_seq;
        stats.acked += out.acked.len() as u64;
        stats.rejected += out.rejected.len() as u64;
        acked[k].extend(out.acked);
        refused[k] += out.rejected.len() as u64;
        for (_, code) in out.rejected {
            *rejections.entry(code).or_default() += 1;
        }
        stats.ack_latency_ms.extend(out.ack_latency_ms);
    }
    stats.seconds = start.elapsed().as_secs_f64();
    stats.ack_latency_ms.sort_by(f64::total_cmp);
    Ok(stats)
}

/// Send the beacon's empty batch `seq`, stamped one reorder window (+10 ms) ahead; returns its
/// time.
async fn sweep(addr: &str, spec: &LoadSpec, seq: u64, clock: Clock) -> Result<f64> {
    let mut ws = ws_connect(&format!("ws://{addr}/v1/ingest"), Some(BEACON_TOKEN)).await?;
    let time = clock.now() + spec.reorder_window + 0.01;
    let batch = serde_json::json!({"sensor": BEACON, "seq": seq, "time": time, "detections": []});
    let reply = crate::send_batch(&mut ws, &batch).await?;
    if reply != serde_json::json!({ "ack": seq }) {
        bail!("beacon batch {seq} not acknowledged: {reply}");
    }
    let _ = ws.close(None).await;
    Ok(time)
}

/// Wait until every fast subscriber has seen every seq of `want` (per sensor index).
async fn wait_seen(seen: &[Arc<Mutex<Seen>>], want: &[BTreeSet<u64>], what: &str) -> Result<()> {
    let start = Instant::now();
    loop {
        let missing: Vec<String> = seen
            .iter()
            .enumerate()
            .filter_map(|(s, seen)| {
                let g = seen.lock().ok()?;
                let n: usize = want
                    .iter()
                    .zip(&g.seqs)
                    .map(|(w, got)| w.difference(got).count())
                    .sum();
                (n > 0).then(|| {
                    format!(
                        "fast subscriber {s}: {n} frames missing ({} skip markers for {} frames)",
                        g.markers, g.skipped
                    )
                })
            })
            .collect();
        if missing.is_empty() {
            return Ok(());
        }
        if start.elapsed() > 2 * WAIT {
            bail!("{what}: {}", missing.join("; "));
        }
        tokio::time::sleep(Duration::from_millis(10)).await;
    }
}

fn counter(s: &prometheus_parse::Scrape, name: &str, labels: &[(&str, &str)]) -> u64 {
    sample(s, name, labels).map_or(u64::MAX, |v| v as u64)
}

/// Peak resident memory of process `pid` (`VmHWM`), KiB.
pub fn peak_rss_kib(pid: u32) -> Option<u64> {
    let s = std::fs::read_to_string(format!("/proc/{pid}/status")).ok()?;
    let line = s.lines().find(|l| l.starts_with("VmHWM:"))?;
    line.split_whitespace().nth(1)?.parse().ok()
}

/// Run `spec` against the binary `bin` (see the module doc). Errors are failures to run at
/// all (server did not start, a connection broke, a wait timed out); the account itself is in
/// [`LoadReport::mismatches`].
pub async fn run(bin: &Path, spec: &LoadSpec) -> Result<LoadReport> {
    let dir = temp_dir("load");
    let cfg = write_file(&dir, "cormorant-flats.toml", &site_toml(spec));
    let mut server = Server::start(
        bin,
        &["serve", "--config", cfg.to_str().context("temp path")?],
    )?;
    let result = drive(&mut server, spec).await;
    if result.is_err() {
        eprintln!("server stderr:\n{}", server.stderr());
    }
    result
}

async fn drive(server: &mut Server, spec: &LoadSpec) -> Result<LoadReport> {
    let addr = server.addr.clone();
    let pid = server.pid().context("server not running")?;
    let n = spec.sensors;
    let mut index: HashMap<String, usize> = (0..n).map(|k| (sensor_id(k), k)).collect();
    index.insert(BEACON.to_string(), n);
    let clock = Clock::new();
    let sent: Sent = Arc::new(Mutex::new(HashMap::new()));
    let frame_lat = Arc::new(Mutex::new(Vec::new()));
    let mut report = LoadReport::default();

    // Fast subscribers, connected before the first batch: they must see every frame.
    let mut seen = Vec::new();
    let mut fast = Vec::new();
    for s in 0..spec.fast_subscribers {
        let ws = ws_connect(&format!("ws://{addr}/v1/frames"), Some(LOAD_READ_TOKEN)).await?;
        let st = Arc::new(Mutex::new(Seen {
            seqs: vec![BTreeSet::new(); n + 1],
            ..Seen::default()
        }));
        seen.push(st.clone());
        let lat = (s == 0).then(|| (sent.clone(), frame_lat.clone()));
        fast.push(tokio::spawn(fast_subscriber(ws, index.clone(), st, lat)));
    }

    let mut next_seq = vec![1u64; n];
    report.refused = vec![0; n];
    let mut acked = vec![BTreeSet::new(); n + 1];
    report.baseline = phase(
        &addr,
        spec,
        spec.baseline_seconds,
        &mut next_seq,
        &mut acked,
        &mut report.refused,
        &mut report.rejections,
        clock,
        &sent,
    )
    .await?;
    let swept = sweep(&addr, spec, 1, clock).await?;
    acked[n].insert(1);
    let mut want = acked.clone();
    want[n].clear(); // the beacon's own batch is held
    wait_seen(&seen, &want, "baseline frames").await?;
    report.baseline.frame_latency_ms = std::mem::take(&mut *lock(&frame_lat)?);
    let boundary = lock(&seen[0])?.frames;

    // Slow subscribers join for the loaded phase.
    let control = Arc::new(SlowControl {
        drain: AtomicBool::new(false),
        expected: AtomicU64::new(u64::MAX),
    });
    let mut slow = Vec::new();
    for _ in 0..spec.slow_subscribers {
        let (ready_tx, ready_rx) = tokio::sync::oneshot::channel();
        slow.push(tokio::spawn(slow_subscriber(
            addr.clone(),
            spec.clone(),
            control.clone(),
            ready_tx,
        )));
        if ready_rx.await.is_err() {
            // The task ended before it was connected: report its error.
            let t = slow.pop().context("slow task")?;
            t.await??;
            bail!("slow subscriber ended before it connected");
        }
    }
    // The next batches must not be older than the beacon's time minus the window.
    let resume = swept - spec.reorder_window + 0.002;
    while clock.now() < resume {
        tokio::time::sleep(Duration::from_millis(2)).await;
    }
    report.loaded = phase(
        &addr,
        spec,
        spec.loaded_seconds,
        &mut next_seq,
        &mut acked,
        &mut report.refused,
        &mut report.rejections,
        clock,
        &sent,
    )
    .await?;
    control.drain.store(true, Ordering::SeqCst);
    sweep(&addr, spec, 2, clock).await?;
    acked[n].insert(2);
    let mut want = acked.clone();
    want[n].remove(&2);
    wait_seen(&seen, &want, "loaded frames").await?;
    report.loaded.frame_latency_ms = std::mem::take(&mut *lock(&frame_lat)?);
    report.loaded.frame_latency_ms.sort_by(f64::total_cmp);
    report.baseline.frame_latency_ms.sort_by(f64::total_cmp);
    let total = lock(&seen[0])?.frames;
    report.frames_while_slow_connected = total - boundary;
    control.expected.store(total - boundary, Ordering::SeqCst);
    let mut slow_stats = Vec::new();
    for t in slow {
        slow_stats.push(t.await.context("slow subscriber task")??);
    }

    // The server's account, while it still runs.
    let m = scrape(&addr).await?;
    let c = &mut report.counters;
    for k in 0..n {
        let l = [("sensor", sensor_id(k))];
        let l: Vec<(&str, &str)> = l.iter().map(|(a, b)| (*a, b.as_str())).collect();
        c.acked
            .push(counter(&m, "plotweave_batches_acked_total", &l));
        c.received
            .push(counter(&m, "plotweave_batches_received_total", &l));
    }
    c.beacon_acked = counter(&m, "plotweave_batches_acked_total", &[("sensor", BEACON)]);
    c.frames = counter(&m, "plotweave_frames_total", &[]);
    c.frames_skipped = counter(&m, "plotweave_frames_skipped_total", &[]);
    c.reorder_pending = counter(&m, "plotweave_reorder_pending_scans", &[]);
    report.peak_rss_kib = peak_rss_kib(pid);

    // Shutdown flushes the beacon's last batch to the fast subscribers, then closes them.
    server.sigterm()?;
    for t in fast {
        tokio::time::timeout(2 * WAIT, t)
            .await
            .map_err(|_| anyhow!("a fast subscriber was not closed at shutdown"))?
            .context("fast subscriber task")??;
    }
    let status = server.wait_exit(2 * WAIT)?;

    // The exact account.
    let mm = &mut report.mismatches;
    if !status.success() {
        mm.push(format!("server exited with {status}"));
    }
    let acked_total: u64 = acked[..n].iter().map(|s| s.len() as u64).sum();
    for (s, seen) in seen.iter().enumerate() {
        let g = lock(seen)?;
        for (k, (want, got)) in acked.iter().zip(&g.seqs).enumerate() {
            if got != want {
                let id = if k == n {
                    BEACON.to_string()
                } else {
                    sensor_id(k)
                };
                let missing = want.difference(got).count();
                let extra = got.difference(want).count();
                mm.push(format!(
                    "fast subscriber {s}, {id}: {missing} acked seqs without a frame, {extra} frames without an ack"
                ));
            }
        }
        if g.markers > 0 || g.repeats > 0 || g.unknown > 0 || !g.closed {
            mm.push(format!(
                "fast subscriber {s}: {} skip markers ({} frames skipped), {} repeated frames, {} of unknown sensors, closed {}",
                g.markers, g.skipped, g.repeats, g.unknown, g.closed
            ));
        }
        if g.frames != acked_total + 2 {
            mm.push(format!(
                "fast subscriber {s}: {} frames for {acked_total} acked load batches + 2 beacon batches",
                g.frames
            ));
        }
        report.subscribers.push(SubscriberStats {
            slow: false,
            frames: g.frames,
            frames_during_load: g.frames,
            skipped: g.skipped,
            markers: g.markers,
        });
    }
    let c = &report.counters;
    for (k, a) in acked[..n].iter().enumerate() {
        let id = sensor_id(k);
        let (a, r) = (a.len() as u64, report.refused[k]);
        if c.acked[k] != a {
            mm.push(format!(
                "{id}: plotweave_batches_acked_total {} but {a} acks received",
                c.acked[k]
            ));
        }
        if c.received[k] != a + r {
            mm.push(format!(
                "{id}: plotweave_batches_received_total {} but {a} batches acked + {r} refused",
                c.received[k]
            ));
        }
    }
    if c.beacon_acked != 2 {
        mm.push(format!(
            "{BEACON}: plotweave_batches_acked_total {}, not 2",
            c.beacon_acked
        ));
    }
    // Before shutdown: every load batch and the first beacon batch had its frame.
    if c.frames != acked_total + 1 {
        mm.push(format!(
            "plotweave_frames_total {} but {acked_total} load batches + 1 beacon batch were released",
            c.frames
        ));
    }
    if c.reorder_pending != 1 {
        mm.push(format!(
            "plotweave_reorder_pending_scans {}, not 1 (the last beacon batch)",
            c.reorder_pending
        ));
    }
    let expected = report.frames_while_slow_connected;
    for (i, st) in slow_stats.iter().enumerate() {
        if st.frames + st.skipped != expected {
            mm.push(format!(
                "slow subscriber {i}: {} frames + {} skipped != {expected} frames published while it was connected",
                st.frames, st.skipped
            ));
        }
    }
    let skipped: u64 = slow_stats.iter().map(|s| s.skipped).sum::<u64>()
        + report.subscribers.iter().map(|s| s.skipped).sum::<u64>();
    if c.frames_skipped != skipped {
        mm.push(format!(
            "plotweave_frames_skipped_total {} but the subscribers were told of {skipped}",
            c.frames_skipped
        ));
    }
    report.subscribers.extend(slow_stats);
    Ok(report)
}

fn lock<T>(m: &Mutex<T>) -> Result<std::sync::MutexGuard<'_, T>> {
    m.lock().map_err(|_| anyhow!("a subscriber task panicked"))
}

impl LoadReport {
    /// A human-readable summary of the run.
    pub fn summary(&self, spec: &LoadSpec) -> String {
        let p = |v: &[f64], q: f64| quantile(v, q);
        let slow: Vec<&SubscriberStats> = self.subscribers.iter().filter(|s| s.slow).collect();
        let mut out = String::new();
        for (name, ph) in [("baseline", &self.baseline), ("loaded", &self.loaded)] {
            out.push_str(&format!(
                "{name}: {} batches in {:.2} s = {:.0} batches/s ({:.0} detections/s); ack p50 {:.2} ms p99 {:.2} ms; frame p50 {:.2} ms p99 {:.2} ms; refused {}\n",
                ph.acked,
                ph.seconds,
                ph.rate(),
                ph.rate() * spec.detections as f64,
                p(&ph.ack_latency_ms, 0.5),
                p(&ph.ack_latency_ms, 0.99),
                p(&ph.frame_latency_ms, 0.5),
                p(&ph.frame_latency_ms, 0.99),
                ph.rejected,
            ));
        }
        out.push_str(&format!(
            "loaded/baseline ingest rate: {:.2}\n",
            self.loaded.rate() / self.baseline.rate().max(1e-9)
        ));
        out.push_str(&format!(
            "slow subscribers (of {} frames while connected): {}\n",
            self.frames_while_slow_connected,
            slow.iter()
                .map(|s| format!(
                    "{} read during load, {} in all, {} skipped in {} markers",
                    s.frames_during_load, s.frames, s.skipped, s.markers
                ))
                .collect::<Vec<_>>()
                .join("; ")
        ));
        out.push_str(&format!(
            "server counters: frames {}, skipped {}, acked {:?}\n",
            self.counters.frames, self.counters.frames_skipped, self.counters.acked
        ));
        if let Some(kib) = self.peak_rss_kib {
            out.push_str(&format!(
                "server peak resident memory: {:.1} MiB\n",
                kib as f64 / 1024.0
            ));
        }
        if self.mismatches.is_empty() {
            out.push_str("count check: exact\n");
        } else {
            out.push_str(&format!(
                "count check: {} MISMATCHES\n  {}\n",
                self.mismatches.len(),
                self.mismatches.join("\n  ")
            ));
        }
        out
    }
}
