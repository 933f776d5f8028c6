//! The per-site engine: admission of scans (sequence, lateness, rate), the tracker, frame
//! serialisation and fan-out. The live service and `plotweave batch` run the same [`Engine`]
//! and the same [`Admission`], so a recording replayed offline yields the frames the live
//! service would have sent.
//!
//! Live data flow and its queues:
//!
//! 1. An ingest connection decodes a batch ([`crate::wire::decode_batch`]), then, holding the
//!    [`Admission`] lock, checks it ([`Admission::admit`]) and sends it into the engine's
//!    bounded queue (capacity `server.limits.queue_depth`). **When the queue is full the send
//!    waits**, so that connection reads no further message until there is room: back-pressure
//!    reaches the sensor through TCP, nothing is dropped. Holding the lock across the send keeps
//!    admission order equal to queue order, so the engine sees scans in the order they were
//!    checked. The batch is acknowledged once it is in the queue.
//! 2. One dedicated OS thread ([`spawn_engine`]) owns the `Tracker`; it takes inputs with
//!    `blocking_recv`, applies them, and serialises each resulting frame **once**.
//! 3. Frames go to subscribers through a `tokio::sync::broadcast` channel of capacity
//!    `server.limits.frame_buffer`. A subscriber that falls more than that many frames behind
//!    loses the oldest ones and is told `{"skipped": N}` (counted in
//!    `plotweave_frames_skipped_total`); **slow subscribers never block the engine**.
//! 4. The latest frame, recent per-track history and sensor health are kept in the [`Hub`] for
//!    the HTTP endpoints.
//!
//! With `[server.snapshot]` the engine thread also hands a snapshot of the tracker to
//! [`crate::snapshot::Snapshotter`] every `interval` (see that module for the restore).
//!
//! When every sender of the queue is gone (shutdown), the engine flushes the tracker's reorder
//! buffer, publishes those frames, takes a last snapshot, marks the hub done and ends.

use std::collections::{BTreeMap, VecDeque};
use std::io::{BufRead, Write};
use std::sync::{Arc, Mutex, RwLock};
use std::time::Instant;

use axum::extract::ws::Utf8Bytes;
use filter_core::tracker::{
    Picture, Scan, SensorConfig, SensorHealth, SensorParams, TrackStatus, Tracker,
};
use serde::Serialize;
use tokio::sync::{broadcast, mpsc, oneshot, watch};

use crate::config::Site;
use crate::error::{Code, Error, Rejection};
use crate::metrics::{self, Metrics, StatusLabels};
use crate::wire::{self, AllTracks, DecodeLimits};

/// Most history points kept per live track for `GET /v1/tracks/{id}` (oldest dropped first).
pub const TRACK_HISTORY_LEN: usize = 64;

// ---- admission ----------------------------------------------------------------------------

/// Per-sensor admission state.
#[derive(Debug, Clone, Default)]
pub struct SensorGate {
    /// Last accepted `seq`.
    pub last_seq: Option<u64>,
    /// Time of the last accepted scan, s since the epoch.
    pub last_time: Option<f64>,
    tokens: f64,
    refilled: Option<Instant>,
}

/// The checks a scan passes before it is queued for the tracker: its sensor's sequence (gaps
/// are counted, repeats refused), its age against the reorder window, and (live only) the
/// per-sensor rate limit.
#[derive(Debug)]
pub struct Admission {
    gates: Vec<SensorGate>,
    ids: Vec<String>,
    latest_time: Option<f64>,
    reorder_window: f64,
    rate: Option<f64>,
}

/// What admission learned about an accepted scan.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct Admitted {
    /// Batches missing between the previous accepted `seq` and this one.
    pub gap: u64,
}

impl Admission {
    /// Admission for `site`; `rate_limited` enables `server.limits.max_batches_per_second`
    /// (the live service), the batch run passes `false`.
    pub fn new(site: &Site, rate_limited: bool) -> Self {
        Admission {
            gates: vec![SensorGate::default(); site.sensors.len()],
            ids: site.sensor_ids(),
            latest_time: None,
            reorder_window: site.tracker.reorder_window,
            rate: rate_limited.then_some(site.server.limits.max_batches_per_second),
        }
    }

    /// The state of sensor `index`.
    pub fn gate(&self, index: usize) -> &SensorGate {
        &self.gates[index]
    }

    /// Continue after a restart: sensor `index` last had batch `seq` at `time` accepted
    /// (restored from a snapshot). The next batch must have a greater `seq`; the site's newest
    /// accepted time becomes at least `time`.
    pub fn resume(&mut self, index: usize, seq: u64, time: f64) {
        let gate = &mut self.gates[index];
        gate.last_seq = Some(gate.last_seq.map_or(seq, |s| s.max(seq)));
        gate.last_time = Some(gate.last_time.map_or(time, |t| t.max(time)));
        self.latest_time = Some(self.latest_time.map_or(time, |t| t.max(time)));
    }

    /// Check `scan` (its `tag` is the batch's seq) and, if accepted, record it.
    ///
    /// Rules, in order: rate (`rate_limited`, only with `now`): a token bucket per sensor holding
    /// at most one second of batches, refilled at `max_batches_per_second`; sequence
    /// (`duplicate_seq`): `seq` must exceed the sensor's last accepted `seq` (a jump is a gap,
    /// counted and accepted); age (`late_scan`): `time` must not be older than the newest
    /// accepted time of the site minus `tracker.reorder_window`.
    pub fn admit(&mut self, scan: &Scan, now: Option<Instant>) -> Result<Admitted, Rejection> {
        let seq = scan.tag;
        let id = &self.ids[scan.sensor];
        let name = format!("batch seq {seq} from {id:?}");
        let gate = &mut self.gates[scan.sensor];
        if let (Some(rate), Some(now)) = (self.rate, now) {
            let capacity = rate.max(1.0);
            let tokens = match gate.refilled {
                None => capacity,
                Some(t) => (gate.tokens + now.saturating_duration_since(t).as_secs_f64() * rate)
                    .min(capacity),
            };
            gate.refilled = Some(now);
            if tokens < 1.0 {
                gate.tokens = tokens;
                return Err(Rejection::new(
                    Code::RateLimited,
                    Some(seq),
                    format!(
                        "{name}: sensor sends faster than server.limits.max_batches_per_second = {rate}; batch not used"
                    ),
                )
                .for_sensor(scan.sensor));
            }
            gate.tokens = tokens - 1.0;
        }
        if let Some(last) = gate.last_seq
            && seq <= last
        {
            return Err(Rejection::new(
                Code::DuplicateSeq,
                Some(seq),
                format!(
                    "{name}: seq: must be greater than the last accepted seq {last} of this sensor (repeated or out-of-order batch)"
                ),
            )
            .for_sensor(scan.sensor));
        }
        if let Some(latest) = self.latest_time
            && scan.time < latest - self.reorder_window
        {
            return Err(Rejection::new(
                Code::LateScan,
                Some(seq),
                format!(
                    "{name}: time: {} is {:.3} s older than the newest accepted scan ({latest}); tracker.reorder_window is {} s",
                    scan.time,
                    latest - scan.time,
                    self.reorder_window
                ),
            )
            .for_sensor(scan.sensor));
        }
        let gap = gate.last_seq.map_or(0, |last| seq - last - 1);
        gate.last_seq = Some(seq);
        gate.last_time = Some(scan.time);
        self.latest_time = Some(self.latest_time.map_or(scan.time, |t| t.max(scan.time)));
        Ok(Admitted { gap })
    }
}

// ---- engine -------------------------------------------------------------------------------

/// A sensor's health as published for `GET /v1/sensors` (a copy of the core's
/// [`SensorHealth`]).
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct HealthSnapshot {
    /// Scans applied since start.
    pub scans: u64,
    /// Scans in the sliding health window.
    pub window_scans: usize,
    /// Clutter rate in use, false detections per scan.
    pub configured_clutter_rate: f64,
    /// Detection probability in use.
    pub configured_detection_probability: f64,
    /// Estimated clutter rate, per scan.
    pub clutter_rate_estimate: Option<f64>,
    /// Estimated detection probability.
    pub detection_probability_estimate: Option<f64>,
    /// Mean NIS over the window.
    pub nis_mean: Option<f64>,
    /// Fraction of NIS samples outside the 95 % interval.
    pub nis_outside_95: Option<f64>,
    /// NIS samples in the window.
    pub nis_samples: usize,
}

impl From<&SensorHealth> for HealthSnapshot {
    fn from(h: &SensorHealth) -> Self {
        HealthSnapshot {
            scans: h.scans,
            window_scans: h.window_scans,
            configured_clutter_rate: h.configured_clutter_rate,
            configured_detection_probability: h.configured_detection_probability,
            clutter_rate_estimate: h.clutter_rate_estimate,
            detection_probability_estimate: h.detection_probability_estimate,
            nis_mean: h.nis_mean,
            nis_outside_95: h.nis_outside_95,
            nis_samples: h.nis_samples,
        }
    }
}

/// The tracker with everything the service does around each scan: metrics, latency
/// bookkeeping and frame serialisation into one reused buffer.
pub struct Engine {
    tracker: Tracker,
    ids: Vec<String>,
    metrics: Arc<Metrics>,
    received: BTreeMap<(usize, u64), Instant>,
    buf: String,
}

impl Engine {
    /// Build the tracker of `site`.
    pub fn new(site: &Site, metrics: Arc<Metrics>) -> Result<Self, Error> {
        let tracker =
            Tracker::new(site.tracker.clone(), site.sensors.clone()).map_err(|e| Error::Core {
                context: format!("cannot build the tracker of site {:?}", site.name),
                source: e,
            })?;
        let engine = Engine {
            tracker,
            ids: site.sensor_ids(),
            metrics,
            received: BTreeMap::new(),
            buf: String::with_capacity(64 * 1024),
        };
        for i in 0..engine.ids.len() {
            engine.publish_health(i);
        }
        Ok(engine)
    }

    /// Sensor ids in index order.
    pub fn sensor_ids(&self) -> &[String] {
        &self.ids
    }

    /// The tracker (for snapshots).
    pub fn tracker(&self) -> &Tracker {
        &self.tracker
    }

    /// Replace the tracker by one restored from a snapshot (same sensors, in the same order),
    /// and publish its sensors' health.
    pub fn restore_tracker(&mut self, tracker: Tracker) {
        self.tracker = tracker;
        for i in 0..self.ids.len() {
            self.publish_health(i);
        }
    }

    /// The sensors' current parameters.
    pub fn sensors(&self) -> &[SensorConfig] {
        self.tracker.sensors()
    }

    /// Health of sensor `index`.
    pub fn health(&self, index: usize) -> HealthSnapshot {
        HealthSnapshot::from(&self.tracker.sensor_health(index))
    }

    /// Apply one admitted scan; `out` receives every frame it releases (its picture and its
    /// JSON text), in time order. `received` is when the batch arrived (latency metric).
    pub fn submit(
        &mut self,
        scan: Scan,
        received: Option<Instant>,
        out: &mut dyn FnMut(Picture, &str),
    ) -> Result<(), filter_core::Error> {
        let key = (scan.sensor, scan.tag);
        let sensor = scan.sensor;
        let start = Instant::now();
        let pictures = self.tracker.submit(scan)?;
        // Live batches only (as the ingest-to-frame latency): not the offline run, nor the
        // recording re-applied after a restore.
        if let Some(t) = received {
            let m = &self.metrics;
            m.engine_wait
                .observe(start.saturating_duration_since(t).as_secs_f64());
            m.tracker_step.observe(start.elapsed().as_secs_f64());
            self.received.insert(key, t);
        }
        self.emit(pictures, out);
        self.publish_health(sensor);
        Ok(())
    }

    /// Release every scan held in the reorder buffer (end of a recording, shutdown).
    pub fn flush(&mut self, out: &mut dyn FnMut(Picture, &str)) {
        let pictures = self.tracker.flush();
        self.emit(pictures, out);
    }

    /// Change sensor `index`'s parameters from the next scan on; returns the new parameters.
    pub fn update_sensor(
        &mut self,
        index: usize,
        params: &SensorParams,
    ) -> Result<SensorConfig, filter_core::Error> {
        self.tracker.update_sensor(index, params)?;
        self.publish_health(index);
        self.metrics
            .sensor_param_changes
            .get_or_create(&metrics::sensor(&self.ids[index]))
            .inc();
        Ok(self.tracker.sensors()[index].clone())
    }

    fn publish_health(&self, index: usize) {
        let h = self.tracker.sensor_health(index);
        let l = metrics::sensor(&self.ids[index]);
        let m = &self.metrics;
        m.clutter_rate_configured
            .get_or_create(&l)
            .set(h.configured_clutter_rate);
        m.detection_probability_configured
            .get_or_create(&l)
            .set(h.configured_detection_probability);
        let or_nan = |v: Option<f64>| v.unwrap_or(f64::NAN);
        m.clutter_rate_estimated
            .get_or_create(&l)
            .set(or_nan(h.clutter_rate_estimate));
        m.detection_probability_estimated
            .get_or_create(&l)
            .set(or_nan(h.detection_probability_estimate));
        m.nis_mean.get_or_create(&l).set(or_nan(h.nis_mean));
        m.nis_outside_95
            .get_or_create(&l)
            .set(or_nan(h.nis_outside_95));
    }

    fn emit(&mut self, pictures: Vec<Picture>, out: &mut dyn FnMut(Picture, &str)) {
        let m = &self.metrics;
        m.reorder_pending.set(self.tracker.pending() as i64);
        for picture in pictures {
            wire::write_frame(&mut self.buf, &picture, &self.ids, &AllTracks);
            let l = metrics::sensor(&self.ids[picture.sensor]);
            let s = &picture.stats;
            if s.births > 0 {
                m.track_births.get_or_create(&l).inc_by(s.births as u64);
            }
            if !picture.ended.is_empty() {
                m.track_ends
                    .get_or_create(&l)
                    .inc_by(picture.ended.len() as u64);
            }
            if s.truncated_clusters > 0 {
                m.hypothesis_truncations
                    .get_or_create(&l)
                    .inc_by(s.truncated_clusters as u64);
            }
            if s.clusters > 0 {
                m.cluster_tracks.observe(s.max_cluster_tracks as f64);
            }
            let confirmed = picture
                .tracks
                .iter()
                .filter(|t| t.status == TrackStatus::Confirmed)
                .count();
            let tentative = picture.tracks.len() - confirmed;
            for (status, n) in [("confirmed", confirmed), ("tentative", tentative)] {
                m.tracks
                    .get_or_create(&StatusLabels {
                        status: status.into(),
                    })
                    .set(n as i64);
            }
            m.track_candidates.set(s.candidates as i64);
            m.frames.inc();
            let key = (picture.sensor, picture.tag);
            let received = self.received.remove(&key);
            out(picture, &self.buf);
            if let Some(t) = received {
                m.ingest_to_frame_latency.observe(t.elapsed().as_secs_f64());
            }
        }
    }
}

// ---- live engine thread -------------------------------------------------------------------

/// An input to the live engine thread.
#[derive(Debug)]
pub enum Input {
    /// An admitted scan and when its batch arrived.
    Scan {
        /// The scan.
        scan: Scan,
        /// Arrival time (for the latency metric).
        received: Instant,
    },
    /// A runtime parameter change, applied before the next queued scan.
    UpdateSensor {
        /// Sensor index.
        sensor: usize,
        /// The change.
        params: SensorParams,
        /// Where the result goes.
        reply: oneshot::Sender<Result<SensorConfig, filter_core::Error>>,
    },
}

/// A published frame: its JSON text (shared, never copied per subscriber) and its picture
/// (for subscribers with filters and for the HTTP endpoints).
#[derive(Debug)]
pub struct FrameMsg {
    /// The frame as sent to unfiltered subscribers.
    pub json: Utf8Bytes,
    /// The picture it was made from.
    pub picture: Picture,
}

/// One point of a track's recent history.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct HistoryPoint {
    /// Time of the update, s since the epoch.
    pub time: f64,
    /// East, m.
    pub x: f64,
    /// North, m.
    pub y: f64,
    /// East velocity, m/s.
    pub vx: f64,
    /// North velocity, m/s.
    pub vy: f64,
    /// Status after the update.
    pub status: &'static str,
}

/// What the engine thread publishes for the rest of the service.
#[derive(Debug)]
pub struct Hub {
    frames: broadcast::Sender<Arc<FrameMsg>>,
    latest: RwLock<Option<Arc<FrameMsg>>>,
    history: Mutex<BTreeMap<u64, VecDeque<HistoryPoint>>>,
    health: Mutex<Vec<HealthSnapshot>>,
    sensors: Mutex<Vec<SensorConfig>>,
    done: watch::Sender<bool>,
    /// The detection echo of accepted scans (see [`crate::echo`]); fed only while listened to.
    echo: broadcast::Sender<Utf8Bytes>,
}

impl Hub {
    /// A hub whose broadcast holds `frame_buffer` frames per subscriber.
    pub fn new(engine: &Engine, frame_buffer: usize) -> Arc<Self> {
        let (frames, _) = broadcast::channel(frame_buffer.max(1));
        let (done, _) = watch::channel(false);
        Arc::new(Hub {
            frames,
            latest: RwLock::new(None),
            history: Mutex::new(BTreeMap::new()),
            health: Mutex::new(
                (0..engine.sensor_ids().len())
                    .map(|i| engine.health(i))
                    .collect(),
            ),
            sensors: Mutex::new(engine.sensors().to_vec()),
            done,
            echo: broadcast::channel(crate::echo::DETECTION_ECHO_BUFFER).0,
        })
    }

    /// A new detection echo subscription (scans taken by the engine from now on).
    pub fn subscribe_detections(&self) -> broadcast::Receiver<Utf8Bytes> {
        self.echo.subscribe()
    }

    /// Publish the detection echo of `scan`; does nothing (no conversion, no allocation) while
    /// nobody listens.
    pub fn echo(&self, scan: &Scan, sensors: &[SensorConfig]) {
        if self.echo.receiver_count() == 0 {
            return;
        }
        let mut text = String::with_capacity(64 + 40 * scan.detections.len());
        crate::echo::write_echo(&mut text, scan, sensors);
        // An error only means that the last listener left meanwhile.
        let _ = self.echo.send(Utf8Bytes::from(text));
    }

    /// A new frame subscription (frames published from now on).
    pub fn subscribe(&self) -> broadcast::Receiver<Arc<FrameMsg>> {
        self.frames.subscribe()
    }

    /// Becomes `true` once the engine has flushed and published its last frame.
    pub fn done(&self) -> watch::Receiver<bool> {
        self.done.subscribe()
    }

    /// The latest frame, if any.
    pub fn latest(&self) -> Option<Arc<FrameMsg>> {
        self.latest
            .read()
            .map(|g| g.clone())
            .unwrap_or_else(|p| p.into_inner().clone())
    }

    /// Recent history of live track `id` (oldest first), if it is live.
    pub fn history(&self, id: u64) -> Option<Vec<HistoryPoint>> {
        lock(&self.history)
            .get(&id)
            .map(|h| h.iter().cloned().collect())
    }

    /// Health of every sensor, as of the last scan each was part of.
    pub fn health(&self) -> Vec<HealthSnapshot> {
        lock(&self.health).clone()
    }

    /// Current sensor parameters (after runtime changes).
    pub fn sensors(&self) -> Vec<SensorConfig> {
        lock(&self.sensors).clone()
    }

    pub(crate) fn publish(&self, picture: Picture, json: &str) {
        {
            let mut history = lock(&self.history);
            for id in &picture.ended {
                history.remove(id);
            }
            for t in &picture.tracks {
                let h = history.entry(t.id).or_default();
                let updated = h.back().is_none_or(|p| p.time != t.last_update);
                if updated {
                    if h.len() == TRACK_HISTORY_LEN {
                        h.pop_front();
                    }
                    h.push_back(HistoryPoint {
                        time: t.last_update,
                        x: t.state[0],
                        y: t.state[1],
                        vx: t.state[2],
                        vy: t.state[3],
                        status: wire::status_name(t.status),
                    });
                }
            }
            // Tracks that left the picture without being listed as ended.
            if history.len() > picture.tracks.len() {
                let live: std::collections::BTreeSet<u64> =
                    picture.tracks.iter().map(|t| t.id).collect();
                history.retain(|id, _| live.contains(id));
            }
        }
        let msg = Arc::new(FrameMsg {
            json: Utf8Bytes::from(json),
            picture,
        });
        match self.latest.write() {
            Ok(mut g) => *g = Some(msg.clone()),
            Err(p) => *p.into_inner() = Some(msg.clone()),
        }
        // An error only means that nobody is subscribed right now.
        let _ = self.frames.send(msg);
    }
}

/// Lock a std mutex, recovering the data if a panicking thread poisoned it (the data are
/// snapshots that are always replaced whole).
fn lock<T>(m: &Mutex<T>) -> std::sync::MutexGuard<'_, T> {
    m.lock().unwrap_or_else(std::sync::PoisonError::into_inner)
}

/// Start the engine thread: it applies inputs until every sender of `rx` is dropped, then
/// flushes, publishes the last frames and marks the hub done. With a `snapshotter` it hands
/// it each applied batch and a snapshot when one is due, and a last one after the flush.
pub fn spawn_engine(
    mut engine: Engine,
    mut rx: mpsc::Receiver<Input>,
    hub: Arc<Hub>,
    mut snapshotter: Option<crate::snapshot::Snapshotter>,
) -> std::io::Result<std::thread::JoinHandle<()>> {
    std::thread::Builder::new()
        .name("plotweave-engine".into())
        .spawn(move || {
            // Marks the hub done even if the engine panics, so nothing waits for it forever.
            struct DoneOnDrop(Arc<Hub>);
            impl Drop for DoneOnDrop {
                fn drop(&mut self) {
                    self.0.done.send_replace(true);
                }
            }
            let _done = DoneOnDrop(hub.clone());
            let metrics = engine.metrics.clone();
            let mut publish = |p: Picture, json: &str| hub.publish(p, json);
            while let Some(input) = rx.blocking_recv() {
                metrics.queue_depth.set(rx.len() as i64);
                match input {
                    Input::Scan { scan, received } => {
                        let (sensor, seq, time) = (scan.sensor, scan.tag, scan.time);
                        hub.echo(&scan, engine.sensors());
                        let result = engine.submit(scan, Some(received), &mut publish);
                        if let (Ok(()), Some(s)) = (&result, &mut snapshotter) {
                            s.applied(sensor, seq, time);
                        }
                        if let Err(e) = result {
                            // Admission mirrors the tracker's rules, so this means the two
                            // disagree: count it and say so; the batch was already acked.
                            let id = &engine.ids[sensor];
                            tracing::warn!(sensor = %id, seq, error = %e, "tracker refused an acknowledged scan");
                            let code = match e.kind() {
                                filter_core::ErrorKind::LateScan => Code::LateScan,
                                _ => Code::Internal,
                            };
                            metrics.count_rejection(id, code);
                        }
                        let h = engine.health(sensor);
                        lock(&hub.health)[sensor] = h;
                    }
                    Input::UpdateSensor {
                        sensor,
                        params,
                        reply,
                    } => {
                        let result = engine.update_sensor(sensor, &params);
                        if result.is_ok() {
                            if let Some(s) = &mut snapshotter {
                                s.changed();
                            }
                            *lock(&hub.sensors) = engine.sensors().to_vec();
                            let h = engine.health(sensor);
                            lock(&hub.health)[sensor] = h;
                        }
                        // The requester may have gone away; the change stands either way.
                        let _ = reply.send(result);
                    }
                }
                if let Some(s) = &mut snapshotter {
                    s.tick(engine.tracker());
                }
            }
            engine.flush(&mut publish);
            if let Some(s) = snapshotter.take() {
                s.finish(engine.tracker());
            }
            metrics.queue_depth.set(0);
            tracing::info!("engine flushed and stopped");
        })
}

// ---- offline run --------------------------------------------------------------------------

/// Counts of an offline run.
#[derive(Debug, Clone, Copy, Default, PartialEq, Eq)]
pub struct BatchSummary {
    /// Lines read.
    pub lines: usize,
    /// Batches accepted.
    pub batches: usize,
    /// Frames written.
    pub frames: usize,
    /// Lines reported and skipped.
    pub skipped: usize,
}

/// `plotweave batch`: read a recording (JSON Lines of detection batches), run the same
/// admission and engine as the live service, write one frame per line to `output`, and report
/// each bad line on `report` as `line N: message` before skipping it. Output depends only on
/// the input and the site, byte for byte.
pub fn run_batch(
    site: &Site,
    mut input: impl BufRead,
    output: &mut dyn Write,
    report: &mut dyn Write,
) -> Result<BatchSummary, Error> {
    let metrics = Arc::new(Metrics::new(&site.sensor_ids()));
    let mut engine = Engine::new(site, metrics)?;
    let mut admission = Admission::new(site, false);
    let limits = DecodeLimits {
        max_detections: site.server.limits.max_detections,
    };
    let mut summary = BatchSummary::default();
    let mut sink = FrameSink {
        output,
        error: None,
        frames: 0,
    };
    // The one reader of recordings (shared with `replay`): it reports torn last lines too.
    let mut reader = crate::record::RecordingReader::new(&mut input);
    while let Some(line) = reader.next_line()? {
        summary.lines += 1;
        let (number, text) = match line {
            crate::record::Line::Batch { number, text } => (number, Some(text)),
            crate::record::Line::Bad { number, message } => {
                summary.skipped += 1;
                writeln!(report, "line {number}: {message}; skipped")
                    .map_err(|e| Error::io("cannot write the report", e))?;
                (number, None)
            }
        };
        let Some(text) = text else { continue };
        let mut bad = |msg: &str| -> Result<(), Error> {
            summary.skipped += 1;
            writeln!(report, "line {number}: {msg}; skipped")
                .map_err(|e| Error::io("cannot write the report", e))
        };
        let scan = match wire::decode_batch(text, &site.sensors, limits) {
            Ok(s) => s,
            Err(r) => {
                bad(&format!("{} ({})", r.message, r.code))?;
                continue;
            }
        };
        if let Err(r) = admission.admit(&scan, None) {
            bad(&format!("{} ({})", r.message, r.code))?;
            continue;
        }
        let (seq, sensor) = (scan.tag, scan.sensor);
        if let Err(e) = engine.submit(scan, None, &mut |_, json| sink.write(json)) {
            bad(&format!(
                "batch seq {seq} from {:?}: the tracker refused it: {e}",
                site.sensors[sensor].id
            ))?;
            continue;
        }
        summary.batches += 1;
        sink.check()?;
    }
    engine.flush(&mut |_, json| sink.write(json));
    sink.check()?;
    sink.output
        .flush()
        .map_err(|e| Error::io("cannot write frames", e))?;
    summary.frames = sink.frames;
    Ok(summary)
}

/// Frame lines to a writer; the first write error is kept and reported after the engine call.
struct FrameSink<'a> {
    output: &'a mut dyn Write,
    error: Option<std::io::Error>,
    frames: usize,
}

impl FrameSink<'_> {
    fn write(&mut self, json: &str) {
        if self.error.is_none() {
            let r = self
                .output
                .write_all(json.as_bytes())
                .and_then(|()| self.output.write_all(b"\n"));
            self.error = r.err();
        }
        self.frames += 1;
    }

    fn check(&mut self) -> Result<(), Error> {
        match self.error.take() {
            Some(e) => Err(Error::io("cannot write frames", e)),
            None => Ok(()),
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use std::time::Duration;

    fn site(reorder_window: f64, rate: f64) -> Site {
        let mut s = Site::demo(|_| None).unwrap();
        s.tracker.reorder_window = reorder_window;
        s.server.limits.max_batches_per_second = rate;
        s
    }

    fn scan(sensor: usize, tag: u64, time: f64) -> Scan {
        Scan {
            sensor,
            time,
            tag,
            detections: Vec::new(),
        }
    }

    #[test]
    fn admission_counts_gaps_and_refuses_repeats_and_late_scans() {
        let mut a = Admission::new(&site(0.0, 50.0), false);
        assert_eq!(a.admit(&scan(0, 5, 100.0), None), Ok(Admitted { gap: 0 }));
        assert_eq!(a.admit(&scan(0, 6, 101.0), None), Ok(Admitted { gap: 0 }));
        assert_eq!(a.admit(&scan(0, 9, 102.0), None), Ok(Admitted { gap: 2 }));
        let r = a.admit(&scan(0, 9, 103.0), None).unwrap_err();
        assert_eq!(
            (r.code, r.seq, r.sensor),
            (Code::DuplicateSeq, Some(9), Some(0))
        );
        assert!(r.message.contains("last accepted seq 9"), "{}", r.message);
        // Another sensor has its own sequence but shares the site's clock.
        let r = a.admit(&scan(1, 1, 101.5), None).unwrap_err();
        assert_eq!(r.code, Code::LateScan);
        assert!(r.message.contains("0.500 s older"), "{}", r.message);
        assert_eq!(a.admit(&scan(1, 1, 102.0), None), Ok(Admitted { gap: 0 }));
        assert_eq!(a.gate(0).last_seq, Some(9));
        assert_eq!(a.gate(1).last_time, Some(102.0));
    }

    #[test]
    fn reorder_window_admits_slightly_old_scans() {
        let mut a = Admission::new(&site(2.0, 50.0), false);
        a.admit(&scan(0, 1, 100.0), None).unwrap();
        assert!(a.admit(&scan(1, 1, 98.5), None).is_ok());
        assert_eq!(
            a.admit(&scan(1, 1, 99.0), None).unwrap_err().code,
            Code::DuplicateSeq
        );
        assert_eq!(
            a.admit(&scan(1, 3, 97.9), None).unwrap_err().code,
            Code::LateScan
        );
    }

    #[test]
    fn rate_limit_is_a_one_second_token_bucket() {
        // 4 batches/s: a burst of 4, then one more per 250 ms of (given, not measured) time.
        let mut a = Admission::new(&site(0.0, 4.0), true);
        let t0 = Instant::now();
        for k in 1..=4 {
            assert!(a.admit(&scan(0, k, k as f64), Some(t0)).is_ok());
        }
        let r = a.admit(&scan(0, 5, 5.0), Some(t0)).unwrap_err();
        assert_eq!(r.code, Code::RateLimited);
        let later = t0 + Duration::from_millis(260);
        assert!(a.admit(&scan(0, 6, 6.0), Some(later)).is_ok());
        assert_eq!(
            a.admit(&scan(0, 7, 7.0), Some(later)).unwrap_err().code,
            Code::RateLimited
        );
        // Without a clock (the batch run) there is no limit.
        let mut b = Admission::new(&site(0.0, 4.0), true);
        for k in 1..=10 {
            assert!(b.admit(&scan(0, k, k as f64), None).is_ok());
        }
    }

    fn recording() -> String {
        let mut s = String::new();
        for k in 0..30u64 {
            let t = 1_764_600_000.0 + k as f64;
            s.push_str(&format!(
                "{{\"sensor\":\"north-mole-camera\",\"seq\":{},\"time\":{t},\"detections\":[{{\"x\":{},\"y\":1000.0}},{{\"x\":-300.0,\"y\":{}}}]}}\n",
                k + 1,
                5.0 * k as f64,
                1500.0 - 4.0 * k as f64
            ));
        }
        s
    }

    #[test]
    fn batch_run_is_byte_for_byte_repeatable() {
        let site = site(0.0, 50.0);
        let run = || {
            let (mut out, mut report) = (Vec::new(), Vec::new());
            let s = run_batch(&site, recording().as_bytes(), &mut out, &mut report).unwrap();
            (s, out, report)
        };
        let (s1, o1, r1) = run();
        let (s2, o2, r2) = run();
        assert_eq!((s1, &o1, &r1), (s2, &o2, &r2));
        assert_eq!(s1.frames, 30);
        assert!(r1.is_empty());
        let last: serde_json::Value =
            serde_json::from_str(std::str::from_utf8(&o1).unwrap().lines().last().unwrap())
                .unwrap();
        assert_eq!(last["tracks"].as_array().unwrap().len(), 2, "{last}");
    }

    #[test]
    fn reorder_window_frames_come_out_in_time_order_and_flush_releases_the_rest() {
        // Lines out of time order across sensors, within a 3 s window.
        let lines = [
            (0, 1, 10.0),
            (1, 1, 11.0),
            (0, 2, 12.5),
            (1, 2, 10.5),
            (0, 3, 14.0),
        ];
        let site = site(3.0, 50.0);
        let mut text = String::new();
        for (sensor, seq, t) in lines {
            let (id, det) = if sensor == 0 {
                ("kestrel-radar", "{\"range\":1500.0,\"bearing\":10.0}")
            } else {
                ("north-mole-camera", "{\"x\":260.0,\"y\":1480.0}")
            };
            text.push_str(&format!(
                "{{\"sensor\":\"{id}\",\"seq\":{seq},\"time\":{t},\"detections\":[{det}]}}\n"
            ));
        }
        let (mut out, mut report) = (Vec::new(), Vec::new());
        let s = run_batch(&site, text.as_bytes(), &mut out, &mut report).unwrap();
        assert_eq!(s.frames, 5, "{}", String::from_utf8_lossy(&report));
        let times: Vec<f64> = std::str::from_utf8(&out)
            .unwrap()
            .lines()
            .map(|l| {
                serde_json::from_str::<serde_json::Value>(l).unwrap()["time"]
                    .as_f64()
                    .unwrap()
            })
            .collect();
        assert_eq!(times, [10.0, 10.5, 11.0, 12.5, 14.0]);
    }
}
