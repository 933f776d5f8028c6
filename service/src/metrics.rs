//! The service's Prometheus metrics (prefix `plotweave_`), registered once in [`Metrics`] and
//! exposed at `GET /metrics` in the Prometheus text format 0.0.4.
//!
//! Every metric, its meaning, healthy value and an example alert is documented in
//! `docs/metrics.md`. Per-sensor series are created at start-up (value 0) so that dashboards
//! and alerts see every configured sensor before its first batch. Batches that name no
//! configured sensor are counted under `sensor="_unknown"`, never under the name they gave
//! (which would let a client create unbounded label values).

use std::sync::atomic::AtomicU64;

use prometheus_client::encoding::EncodeLabelSet;
use prometheus_client::metrics::counter::Counter;
use prometheus_client::metrics::family::Family;
use prometheus_client::metrics::gauge::Gauge;
use prometheus_client::metrics::histogram::{Histogram, exponential_buckets};
use prometheus_client::registry::Registry;

use crate::error::Code;

/// The `sensor` label value used when a batch names no configured sensor.
pub const UNKNOWN_SENSOR_LABEL: &str = "_unknown";

/// Labels `{sensor}`.
#[derive(Clone, Debug, Hash, PartialEq, Eq, EncodeLabelSet)]
pub struct SensorLabels {
    /// Sensor id.
    pub sensor: String,
}

/// Labels `{sensor, reason}` of rejected batches.
#[derive(Clone, Debug, Hash, PartialEq, Eq, EncodeLabelSet)]
pub struct RejectLabels {
    /// Sensor id (or `_unknown`).
    pub sensor: String,
    /// The rejection's code.
    pub reason: String,
}

/// Labels `{status}` of the live track gauge.
#[derive(Clone, Debug, Hash, PartialEq, Eq, EncodeLabelSet)]
pub struct StatusLabels {
    /// `tentative` or `confirmed`.
    pub status: String,
}

/// Labels `{endpoint}` of the open-connection gauge.
#[derive(Clone, Debug, Hash, PartialEq, Eq, EncodeLabelSet)]
pub struct EndpointLabels {
    /// `ingest`, `frames` or `detections`.
    pub endpoint: String,
}

/// Labels `{endpoint, reason}` of refused authorisations and of closed connections.
#[derive(Clone, Debug, Hash, PartialEq, Eq, EncodeLabelSet)]
pub struct EndpointReasonLabels {
    /// The endpoint (one of [`AUTH_ENDPOINTS`] or [`WS_ENDPOINTS`]).
    pub endpoint: String,
    /// Why (an [`AuthReason`] or a [`CloseReason`]).
    pub reason: String,
}

/// The `endpoint` label values of `plotweave_auth_refusals_total`: one per protected path.
pub const AUTH_ENDPOINTS: [&str; 7] = [
    "ingest",
    "frames",
    "detections",
    "tracks",
    "track",
    "sensors",
    "admin",
];

/// The `endpoint` label values of the WebSocket connection metrics.
pub const WS_ENDPOINTS: [&str; 3] = ["ingest", "frames", "detections"];

/// Why an authorisation was refused: the `reason` label of `plotweave_auth_refusals_total`.
/// The first three are answered `401 unauthorized`, the last two `403 forbidden`.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum AuthReason {
    /// No token at all (no `Authorization` header, no bearer subprotocol).
    MissingToken,
    /// An `Authorization` header that is not `Bearer TOKEN`, or a bearer subprotocol that is
    /// not hexadecimal UTF-8.
    Malformed,
    /// A well-formed token that is no one's (wrong, mistyped, or an old token after rotation).
    UnknownToken,
    /// A valid token of another role (a sensor's token on a read path, the read token on
    /// admin or ingest).
    WrongRole,
    /// A sensor's token sending a batch for another sensor (counted per batch).
    WrongSensor,
}

impl AuthReason {
    /// Every reason, in documentation order.
    pub const ALL: [AuthReason; 5] = [
        AuthReason::MissingToken,
        AuthReason::Malformed,
        AuthReason::UnknownToken,
        AuthReason::WrongRole,
        AuthReason::WrongSensor,
    ];

    /// The label value.
    pub fn as_str(self) -> &'static str {
        match self {
            AuthReason::MissingToken => "missing_token",
            AuthReason::Malformed => "malformed",
            AuthReason::UnknownToken => "unknown_token",
            AuthReason::WrongRole => "wrong_role",
            AuthReason::WrongSensor => "wrong_sensor",
        }
    }
}

/// Why a WebSocket session ended: the `reason` label of `plotweave_connections_closed_total`.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
#[must_use]
pub enum CloseReason {
    /// The peer closed, or the connection failed under us (reset, protocol error).
    Peer,
    /// Nothing (no pong, no message) arrived for `server.limits.idle_timeout` while the
    /// server was listening: a half-open or hung peer.
    IdleTimeout,
    /// A message could not be handed to the peer within `server.limits.idle_timeout`: the
    /// peer stopped reading.
    SendTimeout,
    /// A message over `server.limits.max_message_bytes` (ingest).
    TooLarge,
    /// The service shut down (or the engine stopped).
    Shutdown,
}

impl CloseReason {
    /// Every reason, in documentation order.
    pub const ALL: [CloseReason; 5] = [
        CloseReason::Peer,
        CloseReason::IdleTimeout,
        CloseReason::SendTimeout,
        CloseReason::TooLarge,
        CloseReason::Shutdown,
    ];

    /// The label value.
    pub fn as_str(self) -> &'static str {
        match self {
            CloseReason::Peer => "peer",
            CloseReason::IdleTimeout => "idle_timeout",
            CloseReason::SendTimeout => "send_timeout",
            CloseReason::TooLarge => "too_large",
            CloseReason::Shutdown => "shutdown",
        }
    }
}

/// Labels of `plotweave_build_info`.
#[derive(Clone, Debug, Hash, PartialEq, Eq, EncodeLabelSet)]
pub struct BuildLabels {
    /// Crate version.
    pub version: String,
}

type FloatGauge = Gauge<f64, AtomicU64>;

/// The recorder's metrics (`plotweave_recording_*`, see `docs/metrics.md`), cloned into the
/// recording thread ([`crate::record::Recorder`]). They stay at 0 while recording is off.
#[derive(Debug, Clone)]
pub struct RecordingMetrics {
    /// Batches (lines) written to recording files.
    pub batches: Counter,
    /// Bytes written to recording files (each line with its newline).
    pub bytes: Counter,
    /// Successful `fsync(2)`/`fdatasync(2)` calls on recording files.
    pub fsyncs: Counter,
    /// Failed writes, rotations and syncs (each failed writer pass counts once; its batches
    /// are refused `internal`, not acknowledged).
    pub write_errors: Counter,
    /// Seconds of one writer pass: writing the lines queued since the last pass and making
    /// them count per the sync policy; this is what an acknowledgement waits for.
    pub commit_seconds: Histogram,
    /// Lines handed to the recording thread and not yet written.
    pub queue_depth: Gauge,
}

impl RecordingMetrics {
    /// Fresh, unregistered metrics (registered by [`Metrics::new`]).
    pub fn new() -> Self {
        RecordingMetrics {
            batches: Counter::default(),
            bytes: Counter::default(),
            fsyncs: Counter::default(),
            write_errors: Counter::default(),
            // 10 µs, 20 µs, ... 1.3 s: a buffered write is microseconds, an fsync milliseconds.
            commit_seconds: Histogram::new(exponential_buckets(0.000_01, 2.0, 18)),
            queue_depth: Gauge::default(),
        }
    }
}

impl Default for RecordingMetrics {
    fn default() -> Self {
        Self::new()
    }
}

/// The snapshot writer's metrics (`plotweave_snapshot*`, see `docs/metrics.md`), cloned into
/// the engine and writer threads ([`crate::snapshot::Snapshotter`]). They stay at 0 while
/// snapshots are off.
#[derive(Debug, Clone)]
pub struct SnapshotMetrics {
    /// Snapshots taken by the engine (handed to the writer or skipped).
    pub taken: Counter,
    /// Snapshots written and renamed into place.
    pub written: Counter,
    /// Snapshots that could not be written (the previous file stays).
    pub failed: Counter,
    /// Snapshots dropped because the writer was still busy with the previous one.
    pub skipped: Counter,
    /// Size of the last snapshot written, bytes.
    pub bytes: Gauge,
    /// UNIX time of the last snapshot written, s.
    pub last_success: Gauge<f64, AtomicU64>,
    /// Seconds to encode, write and sync one snapshot.
    pub seconds: Histogram,
    /// Batches re-applied from the recording at the last start.
    pub restored_batches: Gauge,
}

impl SnapshotMetrics {
    /// Fresh, unregistered metrics (registered by [`Metrics::new`]).
    pub fn new() -> Self {
        SnapshotMetrics {
            taken: Counter::default(),
            written: Counter::default(),
            failed: Counter::default(),
            skipped: Counter::default(),
            bytes: Gauge::default(),
            last_success: Gauge::default(),
            // 100 µs, 200 µs, ... 6.5 s
            seconds: Histogram::new(exponential_buckets(0.000_1, 2.0, 17)),
            restored_batches: Gauge::default(),
        }
    }
}

impl Default for SnapshotMetrics {
    fn default() -> Self {
        Self::new()
    }
}

/// Upper bounds (s) of the ingest-to-frame latency buckets: a quarter of a millisecond apart
/// from 0.5 to 2 ms, where a healthy site runs, so that a p99 there can be read off the
/// histogram; coarser up to 10 s, where back-pressure and the reorder window
/// (`tracker.reorder_window`, typically tens of ms) put it.
const LATENCY_BUCKETS: [f64; 24] = [
    0.000_1, 0.000_25, 0.000_5, 0.000_75, 0.001, 0.001_25, 0.001_5, 0.001_75, 0.002, 0.002_5,
    0.003, 0.004, 0.005, 0.007_5, 0.01, 0.025, 0.05, 0.1, 0.25, 0.5, 1.0, 2.5, 5.0, 10.0,
];

/// Buckets (s) of the engine's wait and step histograms: 0.1 ms apart up to 1 ms, where a
/// large batch's parts lie, then coarser up to 1 s.
const PART_BUCKETS: [f64; 24] = [
    0.000_05, 0.000_1, 0.000_2, 0.000_3, 0.000_4, 0.000_5, 0.000_6, 0.000_7, 0.000_8, 0.000_9,
    0.001, 0.001_25, 0.001_5, 0.002, 0.003, 0.005, 0.007_5, 0.01, 0.025, 0.05, 0.1, 0.25, 0.5, 1.0,
];

fn cluster_histogram() -> Histogram {
    // 1, 2, 4, ... 512 tracks
    Histogram::new(exponential_buckets(1.0, 2.0, 10))
}

/// Every metric of the service, with the registry that exposes them.
#[derive(Debug)]
pub struct Metrics {
    registry: Registry,
    /// Batches received (decoded or not), per sensor.
    pub batches_received: Family<SensorLabels, Counter>,
    /// Batches refused, per sensor and reason (the rejection code).
    pub batches_rejected: Family<RejectLabels, Counter>,
    /// Batches accepted and acknowledged, per sensor.
    pub batches_acked: Family<SensorLabels, Counter>,
    /// Detections in accepted batches, per sensor.
    pub detections: Family<SensorLabels, Counter>,
    /// Batches missing from the sequence (sum of gap sizes), per sensor.
    pub seq_gaps: Family<SensorLabels, Counter>,
    /// Batches refused as repeated or out of sequence, per sensor.
    pub duplicates: Family<SensorLabels, Counter>,
    /// Batches refused as older than the reorder window allows, per sensor.
    pub late_scans: Family<SensorLabels, Counter>,
    /// Configured clutter rate, false detections per scan, per sensor.
    pub clutter_rate_configured: Family<SensorLabels, FloatGauge>,
    /// Clutter rate estimated over the health window (NaN until estimable), per sensor.
    pub clutter_rate_estimated: Family<SensorLabels, FloatGauge>,
    /// Configured detection probability, per sensor.
    pub detection_probability_configured: Family<SensorLabels, FloatGauge>,
    /// Detection probability estimated over the health window (NaN until estimable).
    pub detection_probability_estimated: Family<SensorLabels, FloatGauge>,
    /// Mean normalised innovation squared over the health window (NaN until estimable).
    pub nis_mean: Family<SensorLabels, FloatGauge>,
    /// Fraction of NIS samples outside the two-sided 95 % chi-square interval.
    pub nis_outside_95: Family<SensorLabels, FloatGauge>,
    /// Live tracks by status.
    pub tracks: Family<StatusLabels, Gauge>,
    /// Tracks born, per sensor whose batch made them.
    pub track_births: Family<SensorLabels, Counter>,
    /// Tracks ended, per sensor whose batch ended them.
    pub track_ends: Family<SensorLabels, Counter>,
    /// Tracks in the largest association cluster of each scan.
    pub cluster_tracks: Histogram,
    /// Clusters whose hypothesis enumeration was truncated (k-best instead of exact).
    pub hypothesis_truncations: Family<SensorLabels, Counter>,
    /// Seconds from receiving a batch to publishing its frame.
    pub ingest_to_frame_latency: Histogram,
    /// The first part of that latency: from receiving a batch to the engine starting on it
    /// (decoding, admission, the engine queue and the engine thread's wake-up).
    pub engine_wait: Histogram,
    /// The tracker's share of it: one batch applied to the tracker (every scan it releases
    /// from the reorder window), on the engine thread.
    pub tracker_step: Histogram,
    /// Track candidates after the last scan: detections no track explained, held internally
    /// until their existence odds rise enough to report them (they are not in frames).
    pub track_candidates: Gauge,
    /// Inputs waiting in the engine queue.
    pub queue_depth: Gauge,
    /// Scans held in the tracker's reorder buffer.
    pub reorder_pending: Gauge,
    /// Connected frame subscribers.
    pub frame_subscribers: Gauge,
    /// Frames published.
    pub frames: Counter,
    /// Frames a lagging subscriber skipped (summed over subscribers).
    pub frames_skipped: Counter,
    /// Open WebSocket connections per endpoint.
    pub connections: Family<EndpointLabels, Gauge>,
    /// WebSocket upgrades refused because `max_connections` was reached.
    pub connections_refused: Counter,
    /// WebSocket sessions ended, per endpoint and [`CloseReason`].
    pub connections_closed: Family<EndpointReasonLabels, Counter>,
    /// Requests and batches refused by authorisation, per endpoint and [`AuthReason`].
    pub auth_refusals: Family<EndpointReasonLabels, Counter>,
    /// Runtime sensor parameter changes applied, per sensor.
    pub sensor_param_changes: Family<SensorLabels, Counter>,
    /// Always 1; the labels carry the build's version.
    pub build_info: Family<BuildLabels, Gauge>,
    /// The recorder's metrics.
    pub recording: RecordingMetrics,
    /// The snapshot writer's metrics.
    pub snapshot: SnapshotMetrics,
}

impl Metrics {
    /// Register every metric; per-sensor series for `sensor_ids` start at 0.
    pub fn new(sensor_ids: &[String]) -> Self {
        let mut r = Registry::with_prefix("plotweave");
        macro_rules! reg {
            ($name:literal, $help:literal, $metric:expr) => {{
                let m = $metric;
                r.register($name, $help, m.clone());
                m
            }};
        }
        let mut m = Metrics {
            batches_received: reg!(
                "batches_received",
                "Detection batches received (decoded or not)",
                Family::default()
            ),
            batches_rejected: reg!(
                "batches_rejected",
                "Detection batches refused, by reason",
                Family::default()
            ),
            batches_acked: reg!(
                "batches_acked",
                "Detection batches accepted and acknowledged",
                Family::default()
            ),
            detections: reg!(
                "detections",
                "Detections in accepted batches",
                Family::default()
            ),
            seq_gaps: reg!(
                "seq_gaps",
                "Batches missing from the per-sensor sequence",
                Family::default()
            ),
            duplicates: reg!(
                "duplicate_batches",
                "Batches refused as repeated or out of sequence",
                Family::default()
            ),
            late_scans: reg!(
                "late_scans",
                "Batches refused as older than the reorder window allows",
                Family::default()
            ),
            clutter_rate_configured: reg!(
                "sensor_clutter_rate_configured",
                "Configured clutter rate (false detections per scan)",
                Family::default()
            ),
            clutter_rate_estimated: reg!(
                "sensor_clutter_rate_estimated",
                "Clutter rate estimated over the health window (false detections per scan)",
                Family::default()
            ),
            detection_probability_configured: reg!(
                "sensor_detection_probability_configured",
                "Configured detection probability",
                Family::default()
            ),
            detection_probability_estimated: reg!(
                "sensor_detection_probability_estimated",
                "Detection probability estimated over the health window",
                Family::default()
            ),
            nis_mean: reg!(
                "sensor_nis_mean",
                "Mean normalised innovation squared over the health window",
                Family::default()
            ),
            nis_outside_95: reg!(
                "sensor_nis_outside_95_ratio",
                "Fraction of NIS samples outside the 95% chi-square interval",
                Family::default()
            ),
            tracks: reg!("tracks", "Live tracks by status", Family::default()),
            track_births: reg!("track_births", "Tracks born", Family::default()),
            track_ends: reg!("track_ends", "Tracks ended", Family::default()),
            cluster_tracks: reg!(
                "cluster_tracks",
                "Tracks in the largest association cluster of a scan",
                cluster_histogram()
            ),
            hypothesis_truncations: reg!(
                "hypothesis_truncations",
                "Clusters whose hypotheses were truncated to the k best",
                Family::default()
            ),
            ingest_to_frame_latency: reg!(
                "ingest_to_frame_latency_seconds",
                "Time from receiving a batch to publishing its frame",
                Histogram::new(LATENCY_BUCKETS.iter().copied())
            ),
            engine_wait: reg!(
                "engine_wait_seconds",
                "Time from receiving a batch to the engine starting on it",
                Histogram::new(PART_BUCKETS.iter().copied())
            ),
            tracker_step: reg!(
                "tracker_step_seconds",
                "Time the engine spends applying one batch to the tracker",
                Histogram::new(PART_BUCKETS.iter().copied())
            ),
            track_candidates: reg!(
                "track_candidates",
                "Track candidates held internally (not reported) after the last scan",
                Gauge::default()
            ),
            queue_depth: reg!(
                "engine_queue_depth",
                "Inputs waiting in the engine queue",
                Gauge::default()
            ),
            reorder_pending: reg!(
                "reorder_pending_scans",
                "Scans held in the tracker's reorder buffer",
                Gauge::default()
            ),
            frame_subscribers: reg!(
                "frame_subscribers",
                "Connected frame subscribers",
                Gauge::default()
            ),
            frames: reg!("frames", "Track frames published", Counter::default()),
            frames_skipped: reg!(
                "frames_skipped",
                "Frames skipped by lagging subscribers",
                Counter::default()
            ),
            connections: reg!(
                "connections",
                "Open WebSocket connections",
                Family::default()
            ),
            connections_refused: reg!(
                "connections_refused",
                "WebSocket upgrades refused at max_connections",
                Counter::default()
            ),
            connections_closed: reg!(
                "connections_closed",
                "WebSocket sessions ended, by endpoint and reason",
                Family::default()
            ),
            auth_refusals: reg!(
                "auth_refusals",
                "Requests and batches refused by authorisation, by endpoint and reason",
                Family::default()
            ),
            sensor_param_changes: reg!(
                "sensor_param_changes",
                "Runtime sensor parameter changes applied",
                Family::default()
            ),
            build_info: reg!("build", "Build information (value 1)", Family::default()),
            recording: {
                let rm = RecordingMetrics::new();
                r.register(
                    "recording_batches",
                    "Batches written to recording files",
                    rm.batches.clone(),
                );
                r.register(
                    "recording_bytes",
                    "Bytes written to recording files",
                    rm.bytes.clone(),
                );
                r.register(
                    "recording_fsyncs",
                    "fsync calls on recording files",
                    rm.fsyncs.clone(),
                );
                r.register(
                    "recording_write_errors",
                    "Failed recording writes, rotations and syncs",
                    rm.write_errors.clone(),
                );
                r.register(
                    "recording_commit_seconds",
                    "Time of one recording writer pass (write and sync per policy)",
                    rm.commit_seconds.clone(),
                );
                r.register(
                    "recording_queue_depth",
                    "Lines waiting for the recording thread",
                    rm.queue_depth.clone(),
                );
                rm
            },
            snapshot: {
                let sm = SnapshotMetrics::new();
                r.register(
                    "snapshots_taken",
                    "Tracker snapshots taken by the engine",
                    sm.taken.clone(),
                );
                r.register(
                    "snapshots_written",
                    "Tracker snapshots written to disk",
                    sm.written.clone(),
                );
                r.register(
                    "snapshot_write_errors",
                    "Tracker snapshots that could not be written",
                    sm.failed.clone(),
                );
                r.register(
                    "snapshots_skipped",
                    "Tracker snapshots dropped because the writer was busy",
                    sm.skipped.clone(),
                );
                r.register(
                    "snapshot_bytes",
                    "Size of the last snapshot written",
                    sm.bytes.clone(),
                );
                r.register(
                    "snapshot_last_success_timestamp_seconds",
                    "UNIX time of the last snapshot written",
                    sm.last_success.clone(),
                );
                r.register(
                    "snapshot_write_seconds",
                    "Time to encode, write and sync one snapshot",
                    sm.seconds.clone(),
                );
                r.register(
                    "snapshot_restored_batches",
                    "Batches re-applied from the recording at start",
                    sm.restored_batches.clone(),
                );
                sm
            },
            registry: Registry::default(),
        };
        m.registry = r;
        m.build_info
            .get_or_create(&BuildLabels {
                version: env!("CARGO_PKG_VERSION").to_string(),
            })
            .set(1);
        for status in ["tentative", "confirmed"] {
            let _ = m.tracks.get_or_create(&StatusLabels {
                status: status.into(),
            });
        }
        for endpoint in WS_ENDPOINTS {
            let _ = m.connections.get_or_create(&EndpointLabels {
                endpoint: endpoint.into(),
            });
            for reason in CloseReason::ALL {
                let _ = m
                    .connections_closed
                    .get_or_create(&endpoint_reason(endpoint, reason.as_str()));
            }
        }
        // Every combination that can happen exists from start-up, so `increase()` sees the
        // first refusal; `wrong_sensor` is a per-batch refusal and exists on ingest only.
        for endpoint in AUTH_ENDPOINTS {
            for reason in AuthReason::ALL {
                if reason != AuthReason::WrongSensor || endpoint == "ingest" {
                    let _ = m
                        .auth_refusals
                        .get_or_create(&endpoint_reason(endpoint, reason.as_str()));
                }
            }
        }
        for id in sensor_ids {
            let l = sensor(id);
            for f in [
                &m.batches_received,
                &m.batches_acked,
                &m.detections,
                &m.seq_gaps,
                &m.duplicates,
                &m.late_scans,
                &m.track_births,
                &m.track_ends,
                &m.hypothesis_truncations,
                &m.sensor_param_changes,
            ] {
                let _ = f.get_or_create(&l);
            }
            for g in [
                &m.clutter_rate_estimated,
                &m.detection_probability_estimated,
                &m.nis_mean,
                &m.nis_outside_95,
            ] {
                g.get_or_create(&l).set(f64::NAN);
            }
        }
        m
    }

    /// The Prometheus text exposition (format 0.0.4) of every metric.
    pub fn encode(&self) -> String {
        let mut out = String::with_capacity(16 * 1024);
        // Writing to a String cannot fail.
        let _ = prometheus_client::encoding::prometheus_text::encode(&mut out, &self.registry);
        out
    }

    /// Count a refused batch (also counts duplicates and late scans in their own series).
    pub fn count_rejection(&self, sensor_label: &str, code: Code) {
        self.batches_rejected
            .get_or_create(&RejectLabels {
                sensor: sensor_label.to_string(),
                reason: code.as_str().to_string(),
            })
            .inc();
        match code {
            Code::DuplicateSeq => {
                self.duplicates.get_or_create(&sensor(sensor_label)).inc();
            }
            Code::LateScan => {
                self.late_scans.get_or_create(&sensor(sensor_label)).inc();
            }
            _ => {}
        }
    }
}

impl Metrics {
    /// Count one refused authorisation on `endpoint` (one of [`AUTH_ENDPOINTS`]).
    pub fn count_auth_refusal(&self, endpoint: &str, reason: AuthReason) {
        self.auth_refusals
            .get_or_create(&endpoint_reason(endpoint, reason.as_str()))
            .inc();
    }

    /// Count one ended WebSocket session on `endpoint` (one of [`WS_ENDPOINTS`]).
    pub fn count_close(&self, endpoint: &str, reason: CloseReason) {
        self.connections_closed
            .get_or_create(&endpoint_reason(endpoint, reason.as_str()))
            .inc();
    }
}

fn endpoint_reason(endpoint: &str, reason: &str) -> EndpointReasonLabels {
    EndpointReasonLabels {
        endpoint: endpoint.to_string(),
        reason: reason.to_string(),
    }
}

/// The `{sensor}` label set of `id`.
pub fn sensor(id: &str) -> SensorLabels {
    SensorLabels {
        sensor: id.to_string(),
    }
}

/// The content type of [`Metrics::encode`]'s output.
pub const CONTENT_TYPE: &str = prometheus_client::encoding::prometheus_text::CONTENT_TYPE;

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn exposition_has_prefix_and_per_sensor_series() {
        let m = Metrics::new(&["a-radar".to_string()]);
        m.batches_received.get_or_create(&sensor("a-radar")).inc();
        m.count_rejection("a-radar", Code::DuplicateSeq);
        let text = m.encode();
        assert!(
            text.contains("plotweave_batches_received_total{sensor=\"a-radar\"} 1"),
            "{text}"
        );
        assert!(text.contains("plotweave_duplicate_batches_total{sensor=\"a-radar\"} 1"));
        assert!(text.contains(
            "plotweave_batches_rejected_total{sensor=\"a-radar\",reason=\"duplicate_seq\"} 1"
        ));
        assert!(text.contains("plotweave_build{version=\""));
        assert!(text.contains("plotweave_sensor_nis_mean{sensor=\"a-radar\"} NaN"));
    }
}
