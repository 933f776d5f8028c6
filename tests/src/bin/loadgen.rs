//! Load generator: starts a `plotweave serve` on loopback with an invented load site, then
//! measures over real WebSocket connections
//! 1. sustained throughput: `--sensors` connections send batches of `--detections` detections
//!    as fast as acknowledgements allow (each keeps `--window` batches in flight) for
//!    `--seconds`, while `--subscribers` frame consumers read every frame;
//! 2. ingest-to-frame latency at half that rate: batches paced evenly, latency measured from
//!    the send of a batch to the arrival of its frame at a subscriber.
//!
//! ```text
//! cargo build --release -p plotweave-tests --bins
//! target/release/loadgen --bin target/release/plotweave-under-test
//! ```
//! Bounded in count and time, loopback only. Prints a summary and one JSON line.
//!
//! With `--slow-subscribers N` it runs the fan-out check of `plotweave_tests::load` instead
//! (the driver of `tests/tests/load.rs`): a baseline phase with only fast subscribers, a
//! loaded phase with N slow ones added, then an exact count check (acked seqs = frames seen =
//! the server's counters) and the server's peak memory; it exits 1 if the account is not exact.
#![allow(missing_docs)]

use std::collections::HashMap;
use std::path::PathBuf;
use std::sync::{Arc, Mutex};
use std::time::{Duration, Instant};

use anyhow::{Context, Result, bail};
use clap::Parser;
use futures_util::{SinkExt, StreamExt};
use plotweave_tests::{Server, temp_dir, write_file};
use tokio_tungstenite::connect_async_with_config;
use tokio_tungstenite::tungstenite::Message;

#[derive(Parser, Debug, Clone)]
struct Args {
    /// The plotweave binary to start.
    #[arg(long, default_value = "target/release/plotweave-under-test")]
    bin: PathBuf,
    /// Sensor connections (each its own sensor).
    #[arg(long, default_value_t = 1)]
    sensors: usize,
    /// Detections per batch.
    #[arg(long, default_value_t = 1000)]
    detections: usize,
    /// Batches in flight per connection.
    #[arg(long, default_value_t = 4)]
    window: usize,
    /// Frame subscribers.
    #[arg(long, default_value_t = 2)]
    subscribers: usize,
    /// Seconds per phase.
    #[arg(long, default_value_t = 10.0)]
    seconds: f64,
    /// Skip the throughput phase and pace the latency phase at this many batches per second.
    #[arg(long)]
    pace: Option<f64>,
    /// Real objects per sensor (the rest of each batch is clutter).
    #[arg(long, default_value_t = 20)]
    objects: usize,
    /// Fan-out check (`plotweave_tests::load`): a baseline phase with `--subscribers` fast
    /// subscribers, then a phase of the same length with this many slow ones added; exact
    /// count check and peak memory at the end. 0 (default) runs the two phases above.
    #[arg(long, default_value_t = 0)]
    slow_subscribers: usize,
    /// Before the load, measure this machine's wake-up jitter for this many seconds: how late a
    /// thread wakes from a 1 ms sleep with nothing else running. A latency percentile of the
    /// service cannot be lower than the machine's own stalls at that percentile.
    #[arg(long, default_value_t = 0.0)]
    probe: f64,
    /// Fan-out check: milliseconds a slow subscriber sleeps before each read.
    #[arg(long, default_value_t = 50)]
    slow_read_ms: u64,
    /// Fan-out check: `SO_RCVBUF` of a slow subscriber's socket, bytes.
    #[arg(long, default_value_t = 4096)]
    slow_recv_buffer: u32,
    /// Fan-out check: `tracker.reorder_window`, s (connections race each other by up to the
    /// ack latency; frames wait this long for stragglers).
    #[arg(long, default_value_t = 0.05)]
    reorder_window: f64,
    /// Fan-out check: `server.limits.frame_buffer`, frames.
    #[arg(long, default_value_t = 256)]
    frame_buffer: usize,
    /// Fan-out check: `server.limits.queue_depth`, batches.
    #[arg(long, default_value_t = 256)]
    queue_depth: usize,
}

/// `--slow-subscribers N`: run the fan-out check and exit 1 unless the account is exact.
async fn fanout(args: &Args) -> Result<()> {
    let spec = plotweave_tests::load::LoadSpec {
        sensors: args.sensors,
        detections: args.detections,
        objects: args.objects.min(args.detections),
        window: args.window,
        fast_subscribers: args.subscribers.max(1),
        slow_subscribers: args.slow_subscribers,
        slow_read: Duration::from_millis(args.slow_read_ms),
        slow_recv_buffer: args.slow_recv_buffer,
        baseline_seconds: args.seconds,
        loaded_seconds: args.seconds,
        reorder_window: args.reorder_window,
        frame_buffer: args.frame_buffer,
        queue_depth: args.queue_depth,
    };
    let r = plotweave_tests::load::run(&args.bin, &spec).await?;
    print!("{}", r.summary(&spec));
    let q = plotweave_tests::load::quantile;
    let slow: Vec<_> = r.subscribers.iter().filter(|s| s.slow).collect();
    println!(
        "{}",
        serde_json::json!({
            "sensors": spec.sensors, "detections_per_batch": spec.detections,
            "fast_subscribers": spec.fast_subscribers, "slow_subscribers": spec.slow_subscribers,
            "baseline_batches_per_second": r.baseline.rate(),
            "loaded_batches_per_second": r.loaded.rate(),
            "loaded_detections_per_second": r.loaded.rate() * spec.detections as f64,
            "baseline_ack_p50_ms": q(&r.baseline.ack_latency_ms, 0.5),
            "baseline_ack_p99_ms": q(&r.baseline.ack_latency_ms, 0.99),
            "loaded_ack_p50_ms": q(&r.loaded.ack_latency_ms, 0.5),
            "loaded_ack_p99_ms": q(&r.loaded.ack_latency_ms, 0.99),
            "loaded_frame_p50_ms": q(&r.loaded.frame_latency_ms, 0.5),
            "loaded_frame_p99_ms": q(&r.loaded.frame_latency_ms, 0.99),
            "frames_while_slow_connected": r.frames_while_slow_connected,
            "slow_frames": slow.iter().map(|s| s.frames).collect::<Vec<_>>(),
            "slow_skipped": slow.iter().map(|s| s.skipped).collect::<Vec<_>>(),
            "slow_markers": slow.iter().map(|s| s.markers).collect::<Vec<_>>(),
            "rejections": r.rejections,
            "peak_rss_mib": r.peak_rss_kib.map(|k| k as f64 / 1024.0),
            "count_match": r.mismatches.is_empty(),
        })
    );
    if !r.mismatches.is_empty() {
        bail!("the count check failed ({} mismatches)", r.mismatches.len());
    }
    Ok(())
}

fn site(args: &Args) -> String {
    // Batches are stamped with the wall clock when sent. One connection keeps them in order;
    // several connections race each other by microseconds, so they need a reorder window,
    // whose hold then adds to the measured latency.
    let window = if args.sensors > 1 { 0.05 } else { 0.0 };
    let mut s = format!(
        "[site]\nname = \"Loadgen Reach\"\n\n[tracker]\nassociation = \"jpda\"\nreorder_window = {window}\n\n"
    );
    for k in 0..args.sensors {
        let x0 = k as f64 * 20_000.0;
        s.push_str(&format!(
            "[[sensor]]\nid = \"load-{k}\"\nkind = \"cartesian\"\nnoise = {{ sigma = 5.0 }}\n\
             fov = {{ x_min = {x0}, x_max = {}, y_min = 0.0, y_max = 10000.0 }}\n\
             detection_probability = 0.9\nclutter_rate = {}\nbirth_rate = 0.05\n\n",
            x0 + 10_000.0,
            args.detections.saturating_sub(args.objects) as f64
        ));
    }
    s.push_str(&format!(
        "[server.limits]\nmax_message_bytes = 16777216\nmax_detections = {}\n\
         max_batches_per_second = 100000.0\nmax_connections = 1024\nqueue_depth = 256\nframe_buffer = 1024\n",
        args.detections.max(1)
    ));
    s
}

/// Deterministic batch `seq` of sensor `k`: `objects` straight-line movers plus uniform clutter,
/// one scan per simulated second, as a staging replay of recorded 1 Hz scans sent as fast as
/// the server takes them. Stamped from a base 35 days in the past (the latency phase starts at
/// seq 1 000 000, 11.6 simulated days on), so that no batch is ahead of
/// the server clock (`server.limits.max_time_ahead`).
fn batch(args: &Args, k: usize, seq: u64) -> String {
    static BASE: std::sync::OnceLock<f64> = std::sync::OnceLock::new();
    let base = *BASE.get_or_init(|| {
        let now = std::time::SystemTime::now()
            .duration_since(std::time::UNIX_EPOCH)
            .map_or(0.0, |d| d.as_secs_f64());
        (now - 3_000_000.0).floor()
    });
    let x0 = k as f64 * 20_000.0;
    let t = seq as f64;
    let mut out = String::with_capacity(args.detections * 40 + 80);
    out.push_str(&format!(
        "{{\"sensor\":\"load-{k}\",\"seq\":{seq},\"time\":{},\"detections\":[",
        base + t
    ));
    let mut state = seq
        .wrapping_mul(6364136223846793005)
        .wrapping_add(k as u64 * 1442695040888963407 + 1);
    let mut rnd = || {
        state ^= state << 13;
        state ^= state >> 7;
        state ^= state << 17;
        (state >> 11) as f64 / (1u64 << 53) as f64
    };
    for i in 0..args.detections {
        let (x, y) = if i < args.objects {
            let row = i as f64;
            (
                x0 + 500.0 + (7.0 * t).rem_euclid(9000.0),
                250.0 + row * 450.0,
            )
        } else {
            (x0 + 10_000.0 * rnd(), 10_000.0 * rnd())
        };
        if i > 0 {
            out.push(',');
        }
        out.push_str("{\"x\":");
        push_centimetres(&mut out, x);
        out.push_str(",\"y\":");
        push_centimetres(&mut out, y);
        out.push('}');
    }
    out.push_str("]}");
    out
}

/// Append `v` (m) rounded to the centimetre, as `format!("{v:.2}")` would up to ties: integer
/// formatting only, because `{:.2}` (exact decimal expansion) took more than half of the load
/// generator's time and competed with the server for the same two cores.
fn push_centimetres(out: &mut String, v: f64) {
    use std::fmt::Write;
    let c = (v * 100.0).round();
    if !c.is_finite() || c.abs() >= 1e15 {
        let _ = write!(out, "{v:.2}");
        return;
    }
    if c < 0.0 {
        out.push('-');
    }
    let c = c.abs() as u64;
    let _ = write!(out, "{}.{:02}", c / 100, c % 100);
}

type Sent = Arc<Mutex<HashMap<(usize, u64), Instant>>>;

struct PhaseResult {
    batches: u64,
    detections: u64,
    seconds: f64,
    latencies_ms: Vec<f64>,
    frames: Vec<u64>,
    skipped: Vec<u64>,
}

async fn phase(addr: &str, args: &Args, pace: Option<f64>, seq0: u64) -> Result<PhaseResult> {
    let sent: Sent = Arc::new(Mutex::new(HashMap::new()));
    let deadline = Instant::now() + Duration::from_secs_f64(args.seconds);
    let mut subs = Vec::new();
    for s in 0..args.subscribers {
        let url = format!("ws://{addr}/v1/frames");
        let (mut ws, _) = connect_async_with_config(url.as_str(), None, true)
            .await
            .context("frames subscriber")?;
        let sent = sent.clone();
        subs.push(tokio::spawn(async move {
            let (mut frames, mut skipped, mut lat) = (0u64, 0u64, Vec::new());
            let stop = deadline + Duration::from_secs(3);
            while let Ok(Some(Ok(msg))) = tokio::time::timeout_at(stop.into(), ws.next()).await {
                let Message::Text(t) = msg else { continue };
                let now = Instant::now();
                // Cheap field scan: frames start with {"time":..,"sensor":"load-K","seq":N
                let v: serde_json::Value = match serde_json::from_str(&t) {
                    Ok(v) => v,
                    Err(_) => continue,
                };
                if let Some(n) = v.get("skipped").and_then(|n| n.as_u64()) {
                    skipped += n;
                    continue;
                }
                frames += 1;
                if s == 0 {
                    let k = v["sensor"]
                        .as_str()
                        .and_then(|id| id.strip_prefix("load-"))
                        .and_then(|k| k.parse::<usize>().ok());
                    if let (Some(k), Some(seq)) = (k, v["seq"].as_u64()) {
                        if let Some(t0) = sent.lock().unwrap().remove(&(k, seq)) {
                            lat.push((now - t0).as_secs_f64() * 1e3);
                        }
                    }
                }
                if now > stop {
                    break;
                }
            }
            (frames, skipped, lat)
        }));
    }
    tokio::time::sleep(Duration::from_millis(200)).await;
    let started = Instant::now();
    let mut senders = Vec::new();
    for k in 0..args.sensors {
        let url = format!("ws://{addr}/v1/ingest");
        let (ws, _) = connect_async_with_config(url.as_str(), None, true)
            .await
            .context("ingest connection")?;
        let (mut tx, mut rx) = ws.split();
        let args = args.clone();
        let sent = sent.clone();
        senders.push(tokio::spawn(async move {
            let mut seq = seq0;
            let mut acked = 0u64;
            let mut in_flight = 0usize;
            let mut ticks = pace.map(|p| pace_ticks(args.sensors as f64 / p, deadline));
            // The pace thread stops at the deadline; from then on nothing more is sent.
            let mut paced_out = false;
            loop {
                while in_flight < args.window && !paced_out && Instant::now() < deadline {
                    // Made before its tick, so that making it does not delay the send.
                    let text = batch(&args, k, seq);
                    if let Some(t) = ticks.as_mut()
                        && t.recv().await.is_none()
                    {
                        paced_out = true;
                        break;
                    }
                    sent.lock().unwrap().insert((k, seq), Instant::now());
                    if tx.send(Message::Text(text.into())).await.is_err() {
                        return Ok::<u64, anyhow::Error>(acked);
                    }
                    seq += 1;
                    in_flight += 1;
                }
                if in_flight == 0 {
                    break;
                }
                match rx.next().await {
                    Some(Ok(Message::Text(t))) => {
                        in_flight -= 1;
                        if t.contains("\"ack\"") {
                            acked += 1;
                        } else {
                            bail!("batch rejected: {t}");
                        }
                    }
                    Some(Ok(_)) => {}
                    _ => break,
                }
            }
            let _ = tx.send(Message::Close(None)).await;
            Ok(acked)
        }));
    }
    let mut batches = 0;
    for s in senders {
        batches += s.await??;
    }
    let seconds = started.elapsed().as_secs_f64();
    let (mut frames, mut skipped, mut lat) = (Vec::new(), Vec::new(), Vec::new());
    for s in subs {
        let (f, sk, l) = s.await?;
        frames.push(f);
        skipped.push(sk);
        lat.extend(l);
    }
    lat.sort_by(f64::total_cmp);
    Ok(PhaseResult {
        batches,
        detections: batches * args.detections as u64,
        seconds,
        latencies_ms: lat,
        frames,
        skipped,
    })
}

/// Ticks every `interval` seconds until `deadline`, from a thread of their own: tokio's timer
/// wheel has a resolution of 1 ms, so a pace of 550 batches/s slept on it sends on millisecond
/// ticks, with gaps of 1 and 2 ms instead of 1.82. A tick that comes late (the thread was not
/// scheduled) is followed by the ones due meanwhile at once, as an open-loop load must. At most
/// `PACE_BACKLOG` ticks wait for a sender that falls behind; when that many wait, the timer
/// thread blocks until the sender takes one, and then sends the ticks it owes at once (the
/// backlog is bounded in memory, not in time).
fn pace_ticks(interval: f64, deadline: Instant) -> tokio::sync::mpsc::Receiver<()> {
    const PACE_BACKLOG: usize = 1024;
    let (tx, rx) = tokio::sync::mpsc::channel(PACE_BACKLOG);
    let interval = Duration::from_secs_f64(interval);
    std::thread::spawn(move || {
        let mut next = Instant::now();
        while next < deadline {
            let now = Instant::now();
            if next > now {
                std::thread::sleep(next - now);
            }
            if tx.blocking_send(()).is_err() {
                break;
            }
            next += interval;
        }
    });
    rx
}

/// How late a thread wakes from `std::thread::sleep(1 ms)` over `span`, in ms: p50, p99,
/// p99.9, max. On a quiet dedicated machine this is tens of microseconds; on a shared virtual
/// machine whose virtual CPUs are preempted by the host it reaches milliseconds, and every
/// thread hand-off of a batch (socket, engine, subscriber) can meet such a stall.
fn wake_jitter(span: Duration) -> (f64, f64, f64, f64) {
    let until = Instant::now() + span;
    let mut late = Vec::new();
    while Instant::now() < until {
        let t0 = Instant::now();
        std::thread::sleep(Duration::from_millis(1));
        late.push((t0.elapsed().as_secs_f64() - 1e-3).max(0.0) * 1e3);
    }
    late.sort_by(f64::total_cmp);
    (
        pct(&late, 0.5),
        pct(&late, 0.99),
        pct(&late, 0.999),
        late.last().copied().unwrap_or(f64::NAN),
    )
}

/// The server's latency histograms: the whole ingest-to-frame span and its two measured parts.
const SERVER_HISTOGRAMS: [(&str, &str); 3] = [
    (
        "plotweave_ingest_to_frame_latency_seconds",
        "ingest-to-frame",
    ),
    (
        "plotweave_engine_wait_seconds",
        "  of which waiting for the engine",
    ),
    (
        "plotweave_tracker_step_seconds",
        "  of which the tracker step",
    ),
];

/// `(le, cumulative count)` of the server's histogram `name`.
fn latency_buckets(scrape: &prometheus_parse::Scrape, name: &str) -> Vec<(f64, f64)> {
    scrape
        .samples
        .iter()
        .find(|s| s.metric == name)
        .and_then(|s| match &s.value {
            prometheus_parse::Value::Histogram(h) => {
                Some(h.iter().map(|b| (b.less_than, b.count)).collect())
            }
            _ => None,
        })
        .unwrap_or_default()
}

/// The smallest bucket bound under which at least the fraction `q` of the observations lie.
fn bucket_bound(buckets: &[(f64, f64)], q: f64) -> Option<f64> {
    let total = buckets.iter().map(|b| b.1).fold(0.0, f64::max);
    (total > 0.0)
        .then(|| buckets.iter().find(|b| b.1 >= q * total).map(|b| b.0))
        .flatten()
}

fn pct(v: &[f64], p: f64) -> f64 {
    if v.is_empty() {
        return f64::NAN;
    }
    v[((v.len() - 1) as f64 * p).round() as usize]
}

fn peak_rss_mib(pid: u32) -> Option<f64> {
    let s = std::fs::read_to_string(format!("/proc/{pid}/status")).ok()?;
    let line = s.lines().find(|l| l.starts_with("VmHWM:"))?;
    let kb: f64 = line.split_whitespace().nth(1)?.parse().ok()?;
    Some(kb / 1024.0)
}

#[tokio::main]
async fn main() -> Result<()> {
    let args = Args::parse();
    let jitter = (args.probe > 0.0).then(|| wake_jitter(Duration::from_secs_f64(args.probe)));
    if let Some((p50, p99, p999, max)) = jitter {
        println!(
            "machine wake-up jitter (1 ms sleeps, idle): p50 {p50:.3} ms, p99 {p99:.3} ms, p99.9 {p999:.3} ms, max {max:.3} ms late"
        );
    }
    if args.slow_subscribers > 0 {
        return fanout(&args).await;
    }
    let dir = temp_dir("loadgen");
    let cfg = write_file(&dir, "load-site.toml", &site(&args));
    let server = Server::start(
        &args.bin,
        &["serve", "--config", cfg.to_str().unwrap_or_default()],
    )?;
    let addr = server.addr.clone();
    let (full, half) = if let Some(p) = args.pace {
        let half = phase(&addr, &args, Some(p), 1_000_000).await?;
        (
            PhaseResult {
                batches: 0,
                detections: 0,
                seconds: 1.0,
                latencies_ms: vec![],
                frames: vec![],
                skipped: vec![],
            },
            half,
        )
    } else {
        let full = phase(&addr, &args, None, 1).await?;
        let rate = full.batches as f64 / full.seconds;
        let half = phase(&addr, &args, Some(rate / 2.0), 1_000_000).await?;
        (full, half)
    };
    let rate = full.batches as f64 / full.seconds;
    let rss = server.pid().and_then(peak_rss_mib);
    // The server's own view: its ingest-to-frame latency histogram over both phases, and the
    // two parts of it that the engine measures.
    if let Ok(scrape) = plotweave_tests::scrape(&addr).await {
        let buckets = latency_buckets(&scrape, SERVER_HISTOGRAMS[0].0);
        for (le, n) in &buckets {
            println!("server plotweave_ingest_to_frame_latency_seconds le={le} {n}");
        }
        for (name, what) in SERVER_HISTOGRAMS {
            let b = latency_buckets(&scrape, name);
            if let (Some(p50), Some(p99)) = (bucket_bound(&b, 0.5), bucket_bound(&b, 0.99)) {
                println!(
                    "server {what} (its histogram, both phases): p50 <= {:.2} ms, p99 <= {:.2} ms",
                    p50 * 1e3,
                    p99 * 1e3
                );
            }
        }
    }
    let det_rate = full.detections as f64 / full.seconds;
    println!(
        "throughput: {:.0} detections/s ({:.0} batches/s of {} detections, {} sensors, window {}), frames per subscriber {:?}, skipped {:?}",
        det_rate, rate, args.detections, args.sensors, args.window, full.frames, full.skipped
    );
    println!(
        "latency at half load ({:.0} batches/s): p50 {:.3} ms, p90 {:.3} ms, p99 {:.3} ms, max {:.3} ms over {} frames; at full load p50 {:.3} ms, p99 {:.3} ms",
        half.batches as f64 / half.seconds,
        pct(&half.latencies_ms, 0.5),
        pct(&half.latencies_ms, 0.9),
        pct(&half.latencies_ms, 0.99),
        half.latencies_ms.last().copied().unwrap_or(f64::NAN),
        half.latencies_ms.len(),
        pct(&full.latencies_ms, 0.5),
        pct(&full.latencies_ms, 0.99)
    );
    if let Some(r) = rss {
        println!("server peak resident memory: {r:.1} MiB");
    }
    println!(
        "{}",
        serde_json::json!({
            "detections_per_second": det_rate, "batches_per_second": rate, "detections_per_batch": args.detections,
            "sensors": args.sensors, "subscribers": args.subscribers, "frames": full.frames, "skipped": full.skipped,
            "half_load_p50_ms": pct(&half.latencies_ms, 0.5), "half_load_p99_ms": pct(&half.latencies_ms, 0.99),
            "wake_jitter_p99_ms": jitter.map(|j| j.1),
            "full_load_p99_ms": pct(&full.latencies_ms, 0.99), "peak_rss_mib": rss,
        })
    );
    drop(server);
    Ok(())
}

#[cfg(test)]
mod tests {
    use super::push_centimetres;

    // The exposition format's cumulative buckets (Prometheus text format 0.0.4, read by the
    // prometheus-parse crate): the bound of a quantile is the first `le` whose count reaches it.
    #[test]
    fn histogram_bucket_bounds_are_read_from_exposition_lines() {
        let lines = [
            "# TYPE plotweave_ingest_to_frame_latency_seconds histogram",
            r#"plotweave_ingest_to_frame_latency_seconds_bucket{le="0.001"} 40"#,
            r#"plotweave_ingest_to_frame_latency_seconds_bucket{le="0.0015"} 95"#,
            r#"plotweave_ingest_to_frame_latency_seconds_bucket{le="0.002"} 99"#,
            r#"plotweave_ingest_to_frame_latency_seconds_bucket{le="+Inf"} 100"#,
            "plotweave_ingest_to_frame_latency_seconds_count 100",
        ];
        let scrape = prometheus_parse::Scrape::parse(lines.iter().map(|l| Ok(l.to_string())))
            .expect("valid exposition text");
        let b = super::latency_buckets(&scrape, "plotweave_ingest_to_frame_latency_seconds");
        assert_eq!(b.len(), 4);
        assert_eq!(super::bucket_bound(&b, 0.5), Some(0.0015));
        assert_eq!(super::bucket_bound(&b, 0.99), Some(0.002));
        assert_eq!(super::bucket_bound(&b, 1.0), Some(f64::INFINITY));
        assert_eq!(super::bucket_bound(&[], 0.5), None);
    }

    #[test]
    fn centimetres_read_back_within_half_a_centimetre() {
        for v in [
            0.0, 0.004, 0.005, 1.0, 9999.995, 12_345.678, -3.456, -0.001, 1e16,
        ] {
            let mut s = String::new();
            push_centimetres(&mut s, v);
            let back: f64 = s.parse().expect(&s);
            assert!((back - v).abs() <= 0.005 + 1e-9, "{v} written as {s}");
            // Exactly two decimals, as `{:.2}` gives.
            assert_eq!(s.split('.').nth(1).map(str::len), Some(2), "{s}");
            // Against std's exact `{:.2}`: equal, or one cent apart on a tie.
            let reference: f64 = format!("{v:.2}").parse().expect("std formats a float");
            assert!(
                (back - reference).abs() <= 0.01 + 1e-9,
                "{s} against {reference}"
            );
        }
    }
}
