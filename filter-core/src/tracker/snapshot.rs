//! The whole state of a [`Tracker`] as plain data ([`TrackerSnapshot`]), and the tracker
//! rebuilt from it. A restored tracker continues exactly where the snapshotted one stood: the
//! same scans afterwards give bit-identical pictures (every number is carried as its exact
//! `f64`; the running sums of the health windows are carried, not recomputed).
//!
//! The snapshot holds the sensors as they are at the time (runtime parameter changes
//! included), the live tracks and internal candidates, the id counter, the picture time, the
//! scans waiting in the reorder buffer, and each sensor's health window. With the `serde`
//! feature every type here is `Serialize`/`Deserialize`; the encoding is the caller's choice
//! (this crate does no I/O).

use std::collections::{BTreeMap, VecDeque};

use nalgebra::{Matrix4, Vector4};

use super::health::{HealthWindow, ScanHealth};
use super::{
    MAX_TRACKS, Scan, SensorConfig, SensorSet, Time, Track, TrackStatus, Tracker, TrackerConfig,
};
use crate::error::{Error, Result};
use crate::gaussian::Gaussian;

/// Version of the snapshot layout; [`Tracker::restore`] refuses any other.
pub const SNAPSHOT_VERSION: u32 = 1;

/// A tracker's whole state. Build with [`Tracker::snapshot`], use with [`Tracker::restore`].
#[derive(Debug, Clone, PartialEq)]
#[cfg_attr(feature = "serde", derive(serde::Serialize, serde::Deserialize))]
pub struct TrackerSnapshot {
    /// [`SNAPSHOT_VERSION`] of the code that wrote it.
    pub version: u32,
    /// The sensors, with their parameters at the time of the snapshot.
    pub sensors: Vec<SensorConfig>,
    /// Reported tracks (ascending id) followed by internal candidates (id 0).
    pub tracks: Vec<TrackSnapshot>,
    /// The id the next reported track gets.
    pub next_id: u64,
    /// Picture time (s), if any scan was applied.
    pub time: Option<f64>,
    /// Newest scan time seen (s), buffered scans included.
    pub newest: Option<f64>,
    /// Scans submitted so far (the reorder buffer's tie-break counter).
    pub arrivals: u64,
    /// Scans in the reorder buffer, in release order, with their arrival numbers.
    pub buffered: Vec<(u64, Scan)>,
    /// Each sensor's health window, in sensor order.
    pub health: Vec<HealthWindowSnapshot>,
}

/// One track's state inside a [`TrackerSnapshot`].
#[derive(Debug, Clone, PartialEq)]
#[cfg_attr(feature = "serde", derive(serde::Serialize, serde::Deserialize))]
pub struct TrackSnapshot {
    /// Reported id, or 0 for an internal candidate.
    pub id: u64,
    /// x, y (m), vx, vy (m/s) at the picture time.
    pub mean: [f64; 4],
    /// Covariance of `mean`, row by row.
    pub cov: [[f64; 4]; 4],
    /// Existence probability.
    pub existence: f64,
    /// Status.
    pub status: TrackStatus,
    /// Time (s) of the last scan that probably detected it.
    pub last_update: f64,
    /// Contributing sensors, as the two halves of [`SensorSet::bits`] (low, high).
    pub sensors: [u64; 2],
    /// Detection history of covered scans, newest in bit 0.
    pub history: u32,
    /// Covered scans seen (saturating at 32).
    pub covered: u32,
    /// Consecutive covered scans without detection.
    pub misses: u32,
    /// Scans applied since birth.
    pub age: u32,
    /// Existence probability at birth.
    pub birth_existence: f64,
}

/// One sensor's health window inside a [`TrackerSnapshot`]: the per-scan sums, oldest first,
/// and their running total (kept as it was, so that the statistics continue bit for bit).
#[derive(Debug, Clone, PartialEq)]
#[cfg_attr(feature = "serde", derive(serde::Serialize, serde::Deserialize))]
pub struct HealthWindowSnapshot {
    /// Scans covered by the statistics since the start.
    pub total_scans: u64,
    /// Per scan: clutter estimate, detected, covered, NIS sum, NIS outside, NIS count.
    pub scans: Vec<(f64, f64, f64, f64, u32, u32)>,
    /// The running total of `scans`, same layout.
    pub sum: (f64, f64, f64, f64, u32, u32),
}

fn health_tuple(h: &ScanHealth) -> (f64, f64, f64, f64, u32, u32) {
    (
        h.clutter,
        h.detected,
        h.covered,
        h.nis_sum,
        h.nis_outside,
        h.nis_count,
    )
}

fn health_from(t: &(f64, f64, f64, f64, u32, u32)) -> ScanHealth {
    ScanHealth {
        clutter: t.0,
        detected: t.1,
        covered: t.2,
        nis_sum: t.3,
        nis_outside: t.4,
        nis_count: t.5,
    }
}

impl Tracker {
    /// The tracker's whole state (see the module documentation).
    pub fn snapshot(&self) -> TrackerSnapshot {
        let tracks = self
            .tracks
            .iter()
            .map(|t| {
                let (m, p) = (t.state.mean(), t.state.cov());
                let mut cov = [[0.0; 4]; 4];
                for (i, row) in cov.iter_mut().enumerate() {
                    for (j, v) in row.iter_mut().enumerate() {
                        *v = p[(i, j)];
                    }
                }
                let bits = t.sensors.bits();
                TrackSnapshot {
                    id: t.id,
                    mean: [m[0], m[1], m[2], m[3]],
                    cov,
                    existence: t.existence,
                    status: t.status,
                    last_update: t.last_update,
                    sensors: [bits as u64, (bits >> 64) as u64],
                    history: t.history,
                    covered: t.covered,
                    misses: t.misses,
                    age: t.age,
                    birth_existence: t.birth_existence,
                }
            })
            .collect();
        TrackerSnapshot {
            version: SNAPSHOT_VERSION,
            sensors: self.sensors.clone(),
            tracks,
            next_id: self.next_id,
            time: self.time,
            newest: self.newest,
            arrivals: self.arrivals,
            buffered: self
                .buffer
                .iter()
                .map(|((_, arrival), scan)| (*arrival, scan.clone()))
                .collect(),
            health: self
                .runtime
                .iter()
                .map(|r| HealthWindowSnapshot {
                    total_scans: r.health.total_scans,
                    scans: r.health.scans.iter().map(health_tuple).collect(),
                    sum: health_tuple(&r.health.sum),
                })
                .collect(),
        }
    }

    /// A tracker with `config` in the state of `snapshot`. The sensors are the snapshot's
    /// (runtime changes included). Everything is checked before it is used; errors name the
    /// part of the snapshot that is wrong. A health window whose length differs from
    /// `config.health_window` is cut to the newest scans that fit (its sums recomputed).
    pub fn restore(config: TrackerConfig, snapshot: TrackerSnapshot) -> Result<Self> {
        let bad = |what: String| Error::input(format!("tracker snapshot: {what}"));
        if snapshot.version != SNAPSHOT_VERSION {
            return Err(bad(format!(
                "version {} is not the supported version {SNAPSHOT_VERSION}",
                snapshot.version
            )));
        }
        let mut tracker =
            Tracker::new(config, snapshot.sensors).map_err(|e| bad(format!("sensors: {e}")))?;
        let n_sensors = tracker.sensors.len();
        if snapshot.tracks.len() > MAX_TRACKS {
            return Err(bad(format!(
                "{} tracks, more than the limit {MAX_TRACKS}",
                snapshot.tracks.len()
            )));
        }
        for (name, t) in [("time", snapshot.time), ("newest", snapshot.newest)] {
            if t.is_some_and(|t| !t.is_finite()) {
                return Err(bad(format!("{name} must be finite")));
            }
        }
        let mut tracks = Vec::with_capacity(snapshot.tracks.len());
        let mut last_id = 0;
        let mut candidates = false;
        for (k, t) in snapshot.tracks.iter().enumerate() {
            let at = |what: &str| bad(format!("tracks[{k}] (id {}): {what}", t.id));
            if t.id == 0 {
                candidates = true;
            } else if candidates || t.id <= last_id || t.id >= snapshot.next_id {
                return Err(at(
                    "reported ids must ascend, come before candidates and be below next_id",
                ));
            } else {
                last_id = t.id;
            }
            let mean = Vector4::from_column_slice(&t.mean);
            let cov = Matrix4::from_fn(|i, j| t.cov[i][j]);
            Gaussian::new(mean, cov).map_err(|e| at(&e.to_string()))?;
            let probability = |p: f64| (0.0..=1.0).contains(&p);
            if !(probability(t.existence) && probability(t.birth_existence)) {
                return Err(at("existence probabilities must be in [0, 1]"));
            }
            if !t.last_update.is_finite() {
                return Err(at("last_update must be finite"));
            }
            let bits = u128::from(t.sensors[0]) | (u128::from(t.sensors[1]) << 64);
            if n_sensors < 128 && bits >> n_sensors != 0 {
                return Err(at("names a sensor index that is not configured"));
            }
            tracks.push(Track {
                id: t.id,
                // Validated above; kept bit for bit (Gaussian::new would symmetrise).
                state: Gaussian::from_parts(mean, cov),
                existence: t.existence,
                status: t.status,
                last_update: t.last_update,
                sensors: SensorSet::from_bits(bits),
                history: t.history,
                covered: t.covered.min(32),
                misses: t.misses,
                age: t.age,
                birth_existence: t.birth_existence,
                duplicate: false,
            });
        }
        if snapshot.health.len() != n_sensors {
            return Err(bad(format!(
                "{} health windows for {n_sensors} sensors",
                snapshot.health.len()
            )));
        }
        for (rt, h) in tracker.runtime.iter_mut().zip(&snapshot.health) {
            let capacity = tracker.config.health_window.max(1);
            let mut window = HealthWindow::new(capacity);
            let n = h.scans.len();
            if n <= capacity && (n == capacity || n as u64 == h.total_scans) {
                // The window as this capacity would have it: carried exactly.
                window.scans = h.scans.iter().map(health_from).collect::<VecDeque<_>>();
                window.sum = health_from(&h.sum);
            } else {
                for s in &h.scans[n.saturating_sub(capacity)..] {
                    window.push(health_from(s));
                }
            }
            window.total_scans = h.total_scans;
            rt.health = window;
        }
        tracker.tracks = tracks;
        tracker.next_id = snapshot.next_id.max(1);
        tracker.time = snapshot.time;
        tracker.newest = snapshot.newest;
        let mut buffer = BTreeMap::new();
        let mut max_arrival = None;
        for (k, (arrival, scan)) in snapshot.buffered.into_iter().enumerate() {
            tracker
                .check_scan(&scan)
                .map_err(|e| bad(format!("buffered[{k}]: {e}")))?;
            if tracker.time.is_some_and(|t| scan.time < t) {
                return Err(bad(format!("buffered[{k}]: older than the picture time")));
            }
            max_arrival = max_arrival.max(Some(arrival));
            if buffer.insert((Time(scan.time), arrival), scan).is_some() {
                return Err(bad(format!("buffered[{k}]: arrival {arrival} repeated")));
            }
        }
        if max_arrival.is_some_and(|a| a >= snapshot.arrivals) {
            return Err(bad("buffered arrival numbers must be below arrivals".into()));
        }
        tracker.buffer = buffer;
        tracker.arrivals = snapshot.arrivals;
        Ok(tracker)
    }
}
