//! The multi-object tracker: one site's live tracks, updated scan by scan from any number of
//! configured sensors.
//!
//! # Flow of one scan
//! 1. **Order**: [`Tracker::submit`] holds a scan in a reorder buffer until the newest scan
//!    time seen is `reorder_window` seconds past it, then applies buffered scans in time order.
//!    A scan older than the picture is refused ([`ErrorKind::LateScan`]). With a window of 0
//!    scans apply on arrival, so the delay is bounded by the window.
//! 2. **Predict** every track to the scan time (nearly-constant velocity, CWNA noise), and decay
//!    its existence probability by the survival probability over the elapsed time.
//! 3. **Gate** with a uniform grid over the scan's detections (see `grid`): each track covered by
//!    the sensor queries the bounding box of its gate and tests d² ≤ γ for the candidates.
//! 4. **Cluster** tracks that share gated detections (union–find) and **associate** each cluster
//!    by GNN or JPDA (exact enumeration, or Murty's k best for large clusters), with the
//!    existence-weighted likelihood ratios of the sensor's clutter model.
//! 5. **Update** states (PDA combination, Joseph form) and existence (integrated PDA, Mušicki,
//!    Evans & Stanković, IEEE TAC 39(6), 1994; joint form, Mušicki & Evans 2004).
//! 6. **Births** from detections no track explains (as internal candidates, reported once
//!    their existence odds pass a sequential test, usually at the second detection of a
//!    sparse sensor and the third in dense clutter), **confirmation** and **ending** by existence
//!    thresholds or an M-of-N rule, covariance bound and coverage; then the per-sensor health
//!    window is updated and the [`Picture`] returned.
//!
//! Everything is deterministic: the same scans give bit-identical pictures.

mod assoc;
mod grid;
mod health;
mod sensor_set;
mod snapshot;

pub use sensor_set::{MAX_SENSORS, SensorSet};
pub use snapshot::{HealthWindowSnapshot, SNAPSHOT_VERSION, TrackSnapshot, TrackerSnapshot};

use std::collections::BTreeMap;

use nalgebra::{Matrix4, SVector, Vector2, Vector4};

use crate::assign::Solver;
use crate::clutter::{DetectionProbability, Region};
use crate::error::{Error, ErrorKind, Result, check_non_negative, check_positive, check_prob};
use crate::gating::Gate;
use crate::gaussian::Gaussian;
use crate::measurement::{
    CartesianPosition, Conversion, MeasurementModel, RangeBearing, RangeBearingRate,
    polar_to_cartesian,
};
use crate::motion::{ConstantVelocity, MotionModel};
use crate::single::pda_combine;
use crate::stats;

use assoc::{Candidates, Method};
use grid::Grid;
use health::{HealthWindow, ScanHealth};

/// How tracks and detections are associated.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum AssociationMethod {
    /// Global nearest neighbour: the single best joint assignment (optimal 2-D assignment).
    Gnn,
    /// Joint probabilistic data association.
    Jpda {
        /// Clusters with at most this many joint hypotheses are enumerated exactly.
        max_exact_hypotheses: usize,
        /// Larger clusters use the k best joint hypotheses (Murty); the truncation is counted.
        k_best: usize,
    },
}

/// How tracks are confirmed and ended.
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum Management {
    /// By existence probability (integrated PDA): confirm when r ≥ `confirm`; a confirmed track
    /// ends when r < `delete`; a tentative track ends when its existence odds have fallen a
    /// hundredfold below its odds at birth (a sequential probability ratio test).
    Existence {
        /// Confirmation threshold, in (0, 1).
        confirm: f64,
        /// Deletion threshold, in (0, confirm).
        delete: f64,
    },
    /// M detections in the last N scans of covering sensors confirm a tentative track; a
    /// tentative track that can no longer reach M ends; a confirmed track ends after
    /// `max_misses` consecutive covered scans without a detection.
    MOfN {
        /// Detections needed, 1 ≤ m ≤ n.
        m: u32,
        /// Window length in covered scans, ≤ 32.
        n: u32,
        /// Consecutive misses that end a confirmed track, ≥ 1.
        max_misses: u32,
    },
}

/// Tracker-wide settings.
#[derive(Debug, Clone, PartialEq)]
pub struct TrackerConfig {
    /// Association method.
    pub association: AssociationMethod,
    /// Track management.
    pub management: Management,
    /// Gate probability P_G, in (0, 1); default 0.99.
    pub gate_probability: f64,
    /// Process noise spectral density q̃ of the CWNA constant-velocity model (m²/s³); default 0.5.
    pub process_noise: f64,
    /// Reorder window (s, ≥ 0); default 0: scans apply on arrival.
    pub reorder_window: f64,
    /// A track whose position standard deviation exceeds this (m) ends; default 500.
    pub max_position_std: f64,
    /// Standard deviation of the velocity prior of a new track (m/s); default 20.
    pub initial_velocity_std: f64,
    /// Probability that an object survives one second, in (0, 1]; default 0.995.
    pub survival_probability: f64,
    /// Scans per sensor in the sliding health window, ≥ 1; default 100.
    pub health_window: usize,
}

impl Default for TrackerConfig {
    fn default() -> Self {
        Self {
            association: AssociationMethod::Jpda {
                max_exact_hypotheses: 2000,
                k_best: 200,
            },
            management: Management::Existence {
                confirm: 0.9,
                delete: 1e-3,
            },
            gate_probability: 0.99,
            process_noise: 0.5,
            reorder_window: 0.0,
            max_position_std: 500.0,
            initial_velocity_std: 20.0,
            survival_probability: 0.995,
            health_window: 100,
        }
    }
}

impl TrackerConfig {
    /// Check every field; the message names the field and the rule.
    pub fn validate(&self) -> Result<()> {
        if let AssociationMethod::Jpda {
            max_exact_hypotheses,
            k_best,
        } = self.association
        {
            if max_exact_hypotheses == 0 || k_best == 0 {
                return Err(Error::param(
                    "association max_exact_hypotheses and k_best must be at least 1",
                ));
            }
        }
        match self.management {
            Management::Existence { confirm, delete } => {
                check_prob("management confirm threshold", confirm, false, false)?;
                check_prob("management delete threshold", delete, false, false)?;
                if delete >= confirm {
                    return Err(Error::param(format!(
                        "management delete threshold must be below the confirm threshold, got delete {delete} >= confirm {confirm}"
                    )));
                }
            }
            Management::MOfN { m, n, max_misses } => {
                if !(1 <= m && m <= n && n <= 32) {
                    return Err(Error::param(format!(
                        "management M-of-N needs 1 <= m <= n <= 32, got m = {m}, n = {n}"
                    )));
                }
                if max_misses == 0 {
                    return Err(Error::param(
                        "management max_misses must be at least 1, got 0",
                    ));
                }
            }
        }
        check_prob("gate probability", self.gate_probability, false, false)?;
        check_non_negative("process noise (m²/s³)", self.process_noise)?;
        check_non_negative("reorder window (s)", self.reorder_window)?;
        check_positive("max position std (m)", self.max_position_std)?;
        check_positive("initial velocity std (m/s)", self.initial_velocity_std)?;
        check_prob(
            "survival probability (per second)",
            self.survival_probability,
            false,
            true,
        )?;
        if self.health_window == 0 {
            return Err(Error::param("health window must be at least 1 scan, got 0"));
        }
        Ok(())
    }
}

/// What a sensor measures and its noise.
#[cfg_attr(feature = "serde", derive(serde::Serialize, serde::Deserialize))]
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum SensorKind {
    /// Positions in the site frame, noise `sigma` (m) per axis.
    Cartesian {
        /// Position noise standard deviation per axis (m).
        sigma: f64,
    },
    /// Range and bearing (and optionally range rate) from a sensor at (x, y) in the site frame.
    Polar {
        /// Sensor east position (m).
        x: f64,
        /// Sensor north position (m).
        y: f64,
        /// Range noise standard deviation (m).
        sigma_range: f64,
        /// Bearing noise standard deviation (degrees).
        sigma_bearing_deg: f64,
        /// Range-rate noise standard deviation (m/s); `None` when range rate is not used.
        sigma_range_rate: Option<f64>,
    },
}

/// The region a sensor observes, in configuration units (metres, degrees).
#[cfg_attr(feature = "serde", derive(serde::Serialize, serde::Deserialize))]
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum FieldOfView {
    /// Site-frame rectangle (m), for cartesian sensors.
    Rect {
        /// West edge (m).
        x_min: f64,
        /// East edge (m).
        x_max: f64,
        /// South edge (m).
        y_min: f64,
        /// North edge (m).
        y_max: f64,
    },
    /// Annular sector around a polar sensor: ranges (m) and bearings from `bearing_start_deg`
    /// clockwise over `bearing_extent_deg` (degrees, (0, 360]).
    Sector {
        /// Minimum range (m).
        min_range: f64,
        /// Maximum range (m).
        max_range: f64,
        /// First bearing (degrees clockwise from north).
        bearing_start_deg: f64,
        /// Angular width (degrees).
        bearing_extent_deg: f64,
    },
}

/// One sensor's configuration: its model and the parameters of its clutter measurement model.
#[cfg_attr(feature = "serde", derive(serde::Serialize, serde::Deserialize))]
#[derive(Debug, Clone, PartialEq)]
pub struct SensorConfig {
    /// Sensor id, as in the wire format.
    pub id: String,
    /// Measurement model and noise.
    pub kind: SensorKind,
    /// Field of view.
    pub fov: FieldOfView,
    /// Detection probability P_D, in (0, 1].
    pub detection_probability: f64,
    /// Mean number of clutter detections per scan over the field of view, λ̄_c ≥ 0.
    pub clutter_rate: f64,
    /// Expected number of new objects per scan over the field of view, > 0.
    pub birth_rate: f64,
}

impl SensorConfig {
    /// Check every field; messages name the sensor, the field and the rule.
    pub fn validate(&self) -> Result<()> {
        self.region().map(|_| ())?;
        self.with_prefix(
            check_prob(
                "detection probability",
                self.detection_probability,
                false,
                true,
            )
            .map(|_| ()),
        )?;
        self.with_prefix(
            check_non_negative("clutter rate (per scan)", self.clutter_rate).map(|_| ()),
        )?;
        self.with_prefix(check_positive("birth rate (per scan)", self.birth_rate).map(|_| ()))?;
        match self.kind {
            SensorKind::Cartesian { sigma } => {
                self.with_prefix(CartesianPosition::new(sigma).map(|_| ()))?
            }
            SensorKind::Polar {
                x,
                y,
                sigma_range,
                sigma_bearing_deg,
                sigma_range_rate,
            } => {
                let p =
                    self.with_prefix(RangeBearing::new([x, y], sigma_range, sigma_bearing_deg))?;
                if let Some(s) = sigma_range_rate {
                    self.with_prefix(RangeBearingRate::new(p, s).map(|_| ()))?;
                }
            }
        }
        Ok(())
    }

    fn with_prefix<T>(&self, r: Result<T>) -> Result<T> {
        r.map_err(|e| Error::new(e.kind(), format!("sensor {}: {}", self.id, e.message())))
    }

    /// Whether the site-frame point (x, y) (m) is inside this sensor's field of view (false
    /// for an invalid configuration).
    pub fn covers(&self, x: f64, y: f64) -> bool {
        self.region().is_ok_and(|r| r.contains(x, y))
    }

    /// The core region of this sensor's field of view (radians, with the sensor origin).
    pub(crate) fn region(&self) -> Result<Region> {
        let region = match (self.kind, self.fov) {
            (
                SensorKind::Cartesian { .. },
                FieldOfView::Rect {
                    x_min,
                    x_max,
                    y_min,
                    y_max,
                },
            ) => Region::Rect {
                x_min,
                x_max,
                y_min,
                y_max,
            },
            (
                SensorKind::Polar { x, y, .. },
                FieldOfView::Sector {
                    min_range,
                    max_range,
                    bearing_start_deg,
                    bearing_extent_deg,
                },
            ) => Region::Sector {
                origin: [x, y],
                min_range,
                max_range,
                bearing_start: bearing_start_deg.to_radians(),
                bearing_extent: bearing_extent_deg.to_radians(),
            },
            (SensorKind::Cartesian { .. }, _) => {
                return Err(Error::param(format!(
                    "sensor {}: a cartesian sensor needs a rectangular field of view",
                    self.id
                )));
            }
            (SensorKind::Polar { .. }, _) => {
                return Err(Error::param(format!(
                    "sensor {}: a polar sensor needs a sector field of view",
                    self.id
                )));
            }
        };
        self.with_prefix(region.validate())?;
        Ok(region)
    }
}

/// A runtime change of a sensor's parameters; `None` leaves a value unchanged.
#[derive(Debug, Clone, Copy, Default, PartialEq)]
pub struct SensorParams {
    /// New P_D.
    pub detection_probability: Option<f64>,
    /// New λ̄_c (per scan).
    pub clutter_rate: Option<f64>,
    /// New cartesian noise (m).
    pub sigma: Option<f64>,
    /// New range noise (m).
    pub sigma_range: Option<f64>,
    /// New bearing noise (degrees).
    pub sigma_bearing_deg: Option<f64>,
}

/// One detection as the tracker takes it.
#[cfg_attr(feature = "serde", derive(serde::Serialize, serde::Deserialize))]
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum Measurement {
    /// Site-frame position (m).
    Cartesian {
        /// East (m).
        x: f64,
        /// North (m).
        y: f64,
    },
    /// Range (m), bearing (degrees clockwise from north), optional range rate (m/s).
    Polar {
        /// Range (m).
        range: f64,
        /// Bearing (degrees).
        bearing_deg: f64,
        /// Range rate (m/s, positive opening).
        range_rate: Option<f64>,
    },
}

/// One scan of one sensor.
#[cfg_attr(feature = "serde", derive(serde::Serialize, serde::Deserialize))]
#[derive(Debug, Clone, PartialEq)]
pub struct Scan {
    /// Index of the sensor in the tracker's sensor list.
    pub sensor: usize,
    /// Time of validity (s, any fixed epoch, e.g. UNIX seconds).
    pub time: f64,
    /// Caller's tag, returned in the picture (the service uses the batch seq).
    pub tag: u64,
    /// The detections; may be empty.
    pub detections: Vec<Measurement>,
}

/// Track status.
#[cfg_attr(feature = "serde", derive(serde::Serialize, serde::Deserialize))]
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, PartialOrd, Ord)]
pub enum TrackStatus {
    /// Not yet confirmed.
    Tentative,
    /// Confirmed.
    Confirmed,
}

/// One live track as shown in a picture.
#[derive(Debug, Clone, PartialEq)]
pub struct TrackView {
    /// Id, never reused within a tracker's life.
    pub id: u64,
    /// Status.
    pub status: TrackStatus,
    /// x, y (m), vx, vy (m/s) in the site frame at the picture time.
    pub state: [f64; 4],
    /// Covariance of `state` (m², m²/s, m²/s²).
    pub covariance: [[f64; 4]; 4],
    /// Existence probability.
    pub existence: f64,
    /// Time (s) of the last scan in which the track was probably detected (probability > ½).
    pub last_update: f64,
    /// Indices of the sensors that have contributed detections.
    pub sensors: SensorSet,
}

/// Counters of one applied scan.
#[derive(Debug, Clone, Copy, Default, PartialEq, Eq)]
pub struct ScanStats {
    /// Detections in the scan.
    pub detections: usize,
    /// Clusters with at least one gated detection.
    pub clusters: usize,
    /// Tracks in the largest cluster.
    pub max_cluster_tracks: usize,
    /// Joint hypotheses evaluated over all clusters.
    pub hypotheses: usize,
    /// Clusters whose hypotheses were truncated to the k best.
    pub truncated_clusters: usize,
    /// Tracks born: candidates that became reported tracks (see [`TENTATIVE_ODDS_RISE`]).
    pub births: usize,
    /// Live track candidates (not yet reported; not in pictures).
    pub candidates: usize,
    /// Tracks ended.
    pub ended: usize,
    /// Births refused because the tracker holds [`MAX_TRACKS`] tracks.
    pub births_refused: usize,
}

/// The picture after one applied scan.
#[derive(Debug, Clone, PartialEq)]
pub struct Picture {
    /// Time of the scan (s); every track is predicted to it.
    pub time: f64,
    /// Sensor index of the scan.
    pub sensor: usize,
    /// The scan's tag.
    pub tag: u64,
    /// Every reported live track, ascending by id. A detection that no track explains starts a
    /// *candidate*, which is kept inside the tracker and enters pictures (as tentative, with a
    /// new id) only once its existence odds have risen a hundredfold (a second detection of a
    /// sparse sensor, a third in dense clutter); most clutter candidates never do, so frames
    /// stay small.
    pub tracks: Vec<TrackView>,
    /// Ids of tracks ended by this scan, ascending.
    pub ended: Vec<u64>,
    /// Counters.
    pub stats: ScanStats,
}

/// Live filter-health statistics of one sensor over the sliding window.
#[derive(Debug, Clone, PartialEq)]
pub struct SensorHealth {
    /// Scans applied since start.
    pub scans: u64,
    /// Scans in the window.
    pub window_scans: usize,
    /// Configured λ̄_c.
    pub configured_clutter_rate: f64,
    /// Configured P_D.
    pub configured_detection_probability: f64,
    /// Estimated clutter detections per scan.
    pub clutter_rate_estimate: Option<f64>,
    /// Estimated P_D of confirmed tracks.
    pub detection_probability_estimate: Option<f64>,
    /// Mean NIS.
    pub nis_mean: Option<f64>,
    /// Fraction of NIS samples outside the two-sided 95 % chi-square interval.
    pub nis_outside_95: Option<f64>,
    /// NIS samples in the window.
    pub nis_samples: usize,
}

/// The measurement model of a sensor, resolved.
#[derive(Debug, Clone, Copy)]
enum Model {
    Cartesian(CartesianPosition),
    Polar(RangeBearing),
    PolarRate(RangeBearingRate),
}

/// Per-sensor state derived from its configuration.
#[derive(Debug, Clone)]
struct SensorRuntime {
    model: Model,
    region: Region,
    pd: DetectionProbability,
    gate: Gate,
    ln_kappa: f64,
    birth_share: f64,
    nis_interval: (f64, f64),
    health: HealthWindow,
}

impl SensorRuntime {
    fn new(cfg: &SensorConfig, config: &TrackerConfig) -> Result<Self> {
        cfg.validate()?;
        let region = cfg.region()?;
        let (model, dim) = match cfg.kind {
            SensorKind::Cartesian { sigma } => {
                (Model::Cartesian(CartesianPosition::new(sigma)?), 2)
            }
            SensorKind::Polar {
                x,
                y,
                sigma_range,
                sigma_bearing_deg,
                sigma_range_rate,
            } => {
                let p = RangeBearing::new([x, y], sigma_range, sigma_bearing_deg)?;
                match sigma_range_rate {
                    Some(s) => (Model::PolarRate(RangeBearingRate::new(p, s)?), 3),
                    None => (Model::Polar(p), 2),
                }
            }
        };
        // Range-rate clutter is taken uniform over ±RANGE_RATE_SPAN m/s.
        let mut fc = region.density();
        if dim == 3 {
            fc /= 2.0 * RANGE_RATE_SPAN;
        }
        // κ = λ̄_c f_c; a clutter-free sensor gets a tiny floor so that ratios stay finite.
        let kappa = (cfg.clutter_rate * fc).max(1e-12 * fc);
        Ok(Self {
            model,
            region,
            pd: DetectionProbability::Constant(cfg.detection_probability),
            gate: Gate::new(config.gate_probability, dim)?,
            ln_kappa: kappa.ln(),
            birth_share: cfg.birth_rate / (cfg.birth_rate + cfg.clutter_rate),
            nis_interval: (
                stats::chi2_quantile(0.025, dim)?,
                stats::chi2_quantile(0.975, dim)?,
            ),
            health: HealthWindow::new(config.health_window),
        })
    }
}

/// Half-width of the uniform range-rate clutter interval (m/s).
const RANGE_RATE_SPAN: f64 = 50.0;

/// Internal track state.
#[derive(Debug, Clone)]
struct Track {
    /// Public id; 0 while the track is a candidate (not yet reported).
    id: u64,
    state: Gaussian<4>,
    existence: f64,
    status: TrackStatus,
    last_update: f64,
    sensors: SensorSet,
    /// Bit history of covered scans, newest in bit 0: 1 = detected.
    history: u32,
    /// Covered scans seen (saturating at 32).
    covered: u32,
    /// Consecutive covered scans without detection.
    misses: u32,
    /// Scans applied since birth.
    age: u32,
    /// Existence probability at birth.
    birth_existence: f64,
    /// A candidate found to duplicate an older track; removed at the end of the scan.
    duplicate: bool,
}

/// A tentative track ends when its existence odds fall below this fraction of its odds at
/// birth: a sequential probability ratio test of "object" against "clutter" (Wald 1945;
/// Blackman & Popoli, *Design and Analysis of Modern Tracking Systems*, 1999, §6.2), so the rule
/// does not depend on how small the birth existence of a cluttered sensor is.
pub const TENTATIVE_ODDS_DROP: f64 = 1e-2;

/// A tentative track not confirmed after this many covered scans ends. In dense clutter the
/// existence of a clutter-born track performs a random walk with almost no drift (under the
/// clutter hypothesis the likelihood ratio is a martingale), so without this bound tentative
/// tracks would accumulate; real objects confirm within a handful of detections.
const TENTATIVE_MAX_SCANS: u32 = 15;

/// Under existence management a candidate is reported (gets an id and enters pictures) when
/// its existence odds have risen this many times above its odds at birth: the upper threshold
/// of the sequential probability ratio test whose lower one is [`TENTATIVE_ODDS_DROP`]. Wald's
/// thresholds for error probabilities α (clutter reported) and β (object dropped) are
/// A ≈ (1 − β)/α and B ≈ β/(1 − α) (Wald 1945); α = β = 1 % gives A ≈ 99 and B ≈ 0.0101,
/// hence 10² and 10⁻². With a sparse sensor the second detection does it (one detection in a
/// gate where clutter is rare is strong evidence); in dense clutter, where two detections a scan
/// apart are nearly as likely clutter as an object, it takes a third.
pub const TENTATIVE_ODDS_RISE: f64 = 1e2;

/// Upper bound on live tracks. Births beyond it are refused (and counted in
/// [`ScanStats::births_refused`]), which bounds memory whatever the sensors send.
pub const MAX_TRACKS: usize = 50_000;

/// Pairs lighter than this fraction of their track's missed weight do not join clusters.
const LINK_MIN: f64 = 1e-2;

fn odds(r: f64) -> f64 {
    r / (1.0 - r).max(1e-300)
}

/// Total order on finite f64 times for the reorder buffer.
#[derive(Debug, Clone, Copy, PartialEq)]
struct Time(f64);
impl Eq for Time {}
impl PartialOrd for Time {
    fn partial_cmp(&self, other: &Self) -> Option<std::cmp::Ordering> {
        Some(self.cmp(other))
    }
}
impl Ord for Time {
    fn cmp(&self, other: &Self) -> std::cmp::Ordering {
        self.0.total_cmp(&other.0)
    }
}

/// Reused per-scan buffers: a large scan allocates nothing once these have grown, and the
/// memory they touch stays the same from scan to scan.
#[derive(Debug, Default)]
struct Scratch {
    grid: Grid,
    solver: Solver,
    candidates: Vec<u32>,
    work: Work,
    m2: Typed<2>,
    m3: Typed<3>,
}

/// Per-scan buffers that do not depend on the measurement dimension (see [`Tracker::update`]).
#[derive(Debug, Default)]
struct Work {
    half_widths: Vec<f64>,
    parent: Vec<u32>,
    owner: Vec<u32>,
    first_pair: Vec<usize>,
    pair_count: Vec<usize>,
    by_root: Vec<(u32, u32)>,
    members: Vec<u32>,
    beta0: Vec<f64>,
    beta: Vec<f64>,
    used: Vec<f64>,
    claimed: Vec<f64>,
    /// `claimed`, from the tracks reported at the start of the scan only.
    claimed_reported: Vec<f64>,
    /// Candidates' most likely detections: (detection, existence after the scan, track).
    rivals: Vec<(u32, f64, u32)>,
    /// Candidates that qualify for reporting this scan unless found to be duplicates.
    promote: Vec<u32>,
    local: Vec<u32>,
    dets: Vec<u32>,
    /// Candidates of the tracks of one cluster; entries past the cluster's size are kept (with
    /// their option buffers) for the next cluster.
    pool: Vec<Candidates>,
    lns: Vec<f64>,
    /// Per track: (ln r, ln(1 − r P_D P_G)) for the tracks with gated detections.
    ln_terms: Vec<(f64, f64)>,
    ws: Vec<f64>,
}

/// A gated (track, detection) pair: indices, innovation, ln likelihood ratio, d².
type Pair<const M: usize> = (u32, u32, SVector<f64, M>, f64, f64);

/// Per-scan buffers of measurement dimension M.
#[derive(Debug, Default)]
struct Typed<const M: usize> {
    /// Per track: what gating needs (None: not covered by the sensor).
    prepared: Vec<Option<GateRecord<M>>>,
    pairs: Vec<Pair<M>>,
    nus: Vec<SVector<f64, M>>,
}

/// What gating needs of one covered track's [`crate::gaussian::PreparedUpdate`]: ẑ, S⁻¹, ln det S, P_D at the
/// track and the half-width (m) of the gate's bounding box. The gain is recomputed in the update
/// for the tracks that gated a detection: keeping whole prepared updates of every track for the
/// length of the scan made large scans stream through twice the memory.
#[derive(Debug, Clone, Copy)]
struct GateRecord<const M: usize> {
    zhat: SVector<f64, M>,
    s_inv: nalgebra::SMatrix<f64, M, M>,
    /// (det S, ln det S) as [`crate::gaussian::PreparedUpdate`] keeps them: the logarithm is
    /// taken only for a track that gates a detection (most candidates gate none).
    det_s: (f64, f64),
    pd: f64,
    hw: f64,
}

/// The buffers of measurement dimension M inside [`Scratch`].
trait TypedScratch<const M: usize> {
    fn typed(&mut self) -> &mut Typed<M>;
}
impl TypedScratch<2> for Scratch {
    fn typed(&mut self) -> &mut Typed<2> {
        &mut self.m2
    }
}
impl TypedScratch<3> for Scratch {
    fn typed(&mut self) -> &mut Typed<3> {
        &mut self.m3
    }
}

/// The multi-object tracker of one site. See the module documentation for the flow of a scan.
///
/// ```
/// use filter_core::tracker::*;
/// let radar = SensorConfig {
///     id: "north-mole-radar".into(),
///     kind: SensorKind::Polar { x: 0.0, y: 0.0, sigma_range: 10.0, sigma_bearing_deg: 0.3, sigma_range_rate: None },
///     fov: FieldOfView::Sector { min_range: 50.0, max_range: 6000.0, bearing_start_deg: 0.0, bearing_extent_deg: 360.0 },
///     detection_probability: 0.9,
///     clutter_rate: 20.0,
///     birth_rate: 0.05,
/// };
/// let mut tracker = Tracker::new(TrackerConfig::default(), vec![radar]).unwrap();
/// let mut confirmed = false;
/// for k in 0..6 {
///     let scan = Scan {
///         sensor: 0,
///         time: 2.0 * k as f64,
///         tag: k,
///         detections: vec![Measurement::Polar { range: 2000.0 + 10.0 * k as f64, bearing_deg: 45.0, range_rate: None }],
///     };
///     for picture in tracker.submit(scan).unwrap() {
///         confirmed |= picture.tracks.iter().any(|t| t.status == TrackStatus::Confirmed);
///     }
/// }
/// assert!(confirmed);
/// ```
#[derive(Debug)]
pub struct Tracker {
    config: TrackerConfig,
    method: Method,
    motion: ConstantVelocity,
    sensors: Vec<SensorConfig>,
    runtime: Vec<SensorRuntime>,
    tracks: Vec<Track>,
    next_id: u64,
    time: Option<f64>,
    newest: Option<f64>,
    buffer: BTreeMap<(Time, u64), Scan>,
    arrivals: u64,
    scratch: Scratch,
}

impl Tracker {
    /// A tracker for `sensors` with `config`. Errors name the first invalid field, and
    /// duplicate sensor ids are refused.
    pub fn new(config: TrackerConfig, sensors: Vec<SensorConfig>) -> Result<Self> {
        config.validate()?;
        if sensors.len() > MAX_SENSORS {
            return Err(Error::param(format!(
                "{} sensors configured; one tracker takes at most {MAX_SENSORS}",
                sensors.len()
            )));
        }
        let mut runtime = Vec::with_capacity(sensors.len());
        for (i, s) in sensors.iter().enumerate() {
            if sensors[..i].iter().any(|o| o.id == s.id) {
                return Err(Error::param(format!(
                    "sensor id {} is configured twice",
                    s.id
                )));
            }
            runtime.push(SensorRuntime::new(s, &config)?);
        }
        let method = match config.association {
            AssociationMethod::Gnn => Method::Gnn,
            AssociationMethod::Jpda {
                max_exact_hypotheses,
                k_best,
            } => Method::Jpda {
                max_exact: max_exact_hypotheses,
                k_best,
            },
        };
        Ok(Self {
            motion: ConstantVelocity::continuous(config.process_noise)?,
            config,
            method,
            sensors,
            runtime,
            tracks: Vec::new(),
            next_id: 1,
            time: None,
            newest: None,
            buffer: BTreeMap::new(),
            arrivals: 0,
            scratch: Scratch::default(),
        })
    }

    /// The configured sensors, in index order.
    pub fn sensors(&self) -> &[SensorConfig] {
        &self.sensors
    }

    /// The tracker settings.
    pub fn config(&self) -> &TrackerConfig {
        &self.config
    }

    /// Index of the sensor with id `id`.
    pub fn sensor_index(&self, id: &str) -> Option<usize> {
        self.sensors.iter().position(|s| s.id == id)
    }

    /// Time of the picture (s): the time of the last applied scan.
    pub fn time(&self) -> Option<f64> {
        self.time
    }

    /// Scans waiting in the reorder buffer.
    pub fn pending(&self) -> usize {
        self.buffer.len()
    }

    /// Apply (or buffer, inside the reorder window) one scan. Returns the pictures of every scan
    /// released by it, in time order (none while it waits in the buffer).
    ///
    /// Errors: [`ErrorKind::UnknownSensor`] for a sensor index out of range,
    /// [`ErrorKind::InvalidInput`] for a non-finite time or detection or a detection of the wrong
    /// kind for the sensor, [`ErrorKind::LateScan`] for a scan older than the picture.
    pub fn submit(&mut self, scan: Scan) -> Result<Vec<Picture>> {
        self.check_scan(&scan)?;
        if let Some(t) = self.time {
            if scan.time < t {
                return Err(Error::new(
                    ErrorKind::LateScan,
                    format!(
                        "scan time {} is {:.3} s older than the picture time {} (reorder window {} s)",
                        scan.time,
                        t - scan.time,
                        t,
                        self.config.reorder_window
                    ),
                ));
            }
        }
        self.newest = Some(self.newest.map_or(scan.time, |n| n.max(scan.time)));
        self.buffer.insert((Time(scan.time), self.arrivals), scan);
        self.arrivals += 1;
        let release_until = self.newest.unwrap_or(f64::NEG_INFINITY) - self.config.reorder_window;
        let mut out = Vec::new();
        while let Some(entry) = self.buffer.first_entry() {
            if entry.key().0.0 > release_until {
                break;
            }
            let scan = entry.remove();
            out.push(self.apply(scan));
        }
        Ok(out)
    }

    /// Apply every buffered scan now, in time order (end of a recording, shutdown).
    pub fn flush(&mut self) -> Vec<Picture> {
        let mut out = Vec::new();
        while let Some((_, scan)) = self.buffer.pop_first() {
            out.push(self.apply(scan));
        }
        out
    }

    fn check_scan(&self, scan: &Scan) -> Result<()> {
        let Some(rt) = self.runtime.get(scan.sensor) else {
            return Err(Error::new(
                ErrorKind::UnknownSensor,
                format!(
                    "sensor index {} is not configured ({} sensors)",
                    scan.sensor,
                    self.sensors.len()
                ),
            ));
        };
        if !scan.time.is_finite() {
            return Err(Error::input(format!(
                "scan time must be finite, got {}",
                scan.time
            )));
        }
        let id = &self.sensors[scan.sensor].id;
        for (i, d) in scan.detections.iter().enumerate() {
            let ok = match (d, rt.model) {
                (Measurement::Cartesian { x, y }, Model::Cartesian(_)) => {
                    x.is_finite() && y.is_finite()
                }
                (
                    Measurement::Polar {
                        range,
                        bearing_deg,
                        range_rate,
                    },
                    Model::Polar(_) | Model::PolarRate(_),
                ) => {
                    if matches!(rt.model, Model::PolarRate(_)) && range_rate.is_none() {
                        return Err(Error::input(format!(
                            "detections[{i}] has no range_rate, which sensor {id} is configured to measure"
                        )));
                    }
                    range.is_finite()
                        && *range >= 0.0
                        && bearing_deg.is_finite()
                        && range_rate.is_none_or(|r| r.is_finite())
                }
                (Measurement::Cartesian { .. }, _) => {
                    return Err(Error::input(format!(
                        "detections[{i}] is cartesian but sensor {id} is polar"
                    )));
                }
                (Measurement::Polar { .. }, _) => {
                    return Err(Error::input(format!(
                        "detections[{i}] is polar but sensor {id} is cartesian"
                    )));
                }
            };
            if !ok {
                return Err(Error::input(format!(
                    "detections[{i}] must be finite (and range non-negative), got {d:?}"
                )));
            }
        }
        Ok(())
    }

    /// Live tracks now, ascending by id.
    pub fn picture(&self) -> Vec<TrackView> {
        // Ids are given at promotion, so creation order is not id order: sort small (id, index)
        // keys (ids are unique), then build the views in that order.
        let mut order: Vec<(u64, u32)> = self
            .tracks
            .iter()
            .enumerate()
            .filter(|(_, t)| t.id != 0)
            .map(|(i, t)| (t.id, i as u32))
            .collect();
        order.sort_unstable();
        order
            .iter()
            .map(|&(_, i)| view(&self.tracks[i as usize]))
            .collect()
    }

    /// Change a sensor's P_D, clutter rate or noise; applies from the next scan.
    pub fn update_sensor(&mut self, sensor: usize, params: &SensorParams) -> Result<()> {
        let Some(cfg) = self.sensors.get(sensor) else {
            return Err(Error::new(
                ErrorKind::UnknownSensor,
                format!("sensor index {sensor} is not configured"),
            ));
        };
        let mut cfg = cfg.clone();
        if let Some(p) = params.detection_probability {
            cfg.detection_probability = p;
        }
        if let Some(c) = params.clutter_rate {
            cfg.clutter_rate = c;
        }
        match &mut cfg.kind {
            SensorKind::Cartesian { sigma } => {
                if params.sigma_range.is_some() || params.sigma_bearing_deg.is_some() {
                    return Err(Error::param(format!(
                        "sensor {}: range and bearing noise do not apply to a cartesian sensor",
                        cfg.id
                    )));
                }
                if let Some(s) = params.sigma {
                    *sigma = s;
                }
            }
            SensorKind::Polar {
                sigma_range,
                sigma_bearing_deg,
                ..
            } => {
                if params.sigma.is_some() {
                    return Err(Error::param(format!(
                        "sensor {}: cartesian noise sigma does not apply to a polar sensor",
                        cfg.id
                    )));
                }
                if let Some(s) = params.sigma_range {
                    *sigma_range = s;
                }
                if let Some(s) = params.sigma_bearing_deg {
                    *sigma_bearing_deg = s;
                }
            }
        }
        let mut rt = SensorRuntime::new(&cfg, &self.config)?;
        rt.health = std::mem::take(&mut self.runtime[sensor].health);
        self.runtime[sensor] = rt;
        self.sensors[sensor] = cfg;
        Ok(())
    }

    /// Health statistics of sensor `sensor` over the sliding window.
    ///
    /// # Panics
    /// When `sensor` is not a configured index.
    pub fn sensor_health(&self, sensor: usize) -> SensorHealth {
        let rt = &self.runtime[sensor];
        let cfg = &self.sensors[sensor];
        let (nis_mean, nis_outside_95, nis_samples) = rt.health.nis();
        SensorHealth {
            scans: rt.health.total_scans,
            window_scans: rt.health.len(),
            configured_clutter_rate: cfg.clutter_rate,
            configured_detection_probability: cfg.detection_probability,
            clutter_rate_estimate: rt.health.clutter_rate(),
            detection_probability_estimate: rt
                .health
                .detection_probability(self.config.gate_probability),
            nis_mean,
            nis_outside_95,
            nis_samples,
        }
    }

    /// Apply one scan that is known to be valid and in time order.
    fn apply(&mut self, scan: Scan) -> Picture {
        let t = scan.time;
        let ps = self.config.survival_probability;
        // Every track is at the picture time, so one step and one survival factor serve all.
        let survival = ps.powf((t - self.time.unwrap_or(t)).max(0.0));
        for tr in &mut self.tracks {
            let dt = (t - self.time.unwrap_or(t)).max(0.0);
            // dt ≥ 0 and finite by construction, so predict cannot fail.
            if let Ok(p) = self.motion.predict(&tr.state, dt) {
                tr.state = p;
            }
            tr.existence *= survival;
        }
        self.time = Some(t);
        let s = scan.sensor;
        let mut stats = ScanStats {
            detections: scan.detections.len(),
            ..ScanStats::default()
        };
        let model = self.runtime[s].model;
        match model {
            Model::Cartesian(m) => {
                let zs: Vec<Vector2<f64>> = scan
                    .detections
                    .iter()
                    .map(|d| match *d {
                        Measurement::Cartesian { x, y } => Vector2::new(x, y),
                        Measurement::Polar { .. } => Vector2::zeros(),
                    })
                    .collect();
                let xy: Vec<[f64; 2]> = zs.iter().map(|z| [z[0], z[1]]).collect();
                self.update::<2, _>(s, &m, &zs, &xy, t, &mut stats);
            }
            Model::Polar(m) => {
                let (zs, xy) = polar_vectors::<2>(&scan.detections, m.position);
                self.update::<2, _>(s, &m, &zs, &xy, t, &mut stats);
            }
            Model::PolarRate(m) => {
                let (zs, xy) = polar_vectors::<3>(&scan.detections, m.polar.position);
                self.update::<3, _>(s, &m, &zs, &xy, t, &mut stats);
            }
        }
        // End tracks: thresholds, covariance bound, coverage.
        let mut ended = Vec::new();
        let max_var = self.config.max_position_std * self.config.max_position_std;
        let management = self.config.management;
        let runtime = &self.runtime;
        self.tracks.retain(|tr| {
            let p = tr.state.cov();
            let (x, y) = (tr.state.mean()[0], tr.state.mean()[1]);
            let by_rule = match management {
                Management::Existence { delete, .. } => match tr.status {
                    TrackStatus::Confirmed => tr.existence < delete,
                    TrackStatus::Tentative => {
                        (tr.age > 0
                            && odds(tr.existence) < TENTATIVE_ODDS_DROP * odds(tr.birth_existence))
                            || tr.age >= TENTATIVE_MAX_SCANS
                    }
                },
                Management::MOfN { m, n, max_misses } => match tr.status {
                    TrackStatus::Confirmed => tr.misses >= max_misses,
                    TrackStatus::Tentative => {
                        let seen = tr.covered.min(n);
                        let hits = (tr.history & mask(seen)).count_ones();
                        hits + (n - seen) < m
                    }
                },
            };
            let lost = p[(0, 0)].max(p[(1, 1)]) > max_var || !tr.state.is_finite();
            let outside = !runtime.iter().any(|r| r.region.contains(x, y));
            if by_rule || lost || outside || tr.duplicate {
                if tr.id != 0 {
                    ended.push(tr.id);
                }
                false
            } else {
                true
            }
        });
        stats.ended = ended.len();
        stats.candidates = self.tracks.iter().filter(|t| t.id == 0).count();
        ended.sort_unstable();
        Picture {
            time: t,
            sensor: s,
            tag: scan.tag,
            tracks: self.picture(),
            ended,
            stats,
        }
    }

    /// Gate, associate and update all tracks with one scan of sensor `s` whose measurement
    /// vectors are `zs` (site-plane positions `xy` for the spatial index).
    fn update<const M: usize, Me: MeasurementModel<4, M>>(
        &mut self,
        s: usize,
        model: &Me,
        zs: &[SVector<f64, M>],
        xy: &[[f64; 2]],
        t: f64,
        stats: &mut ScanStats,
    ) where
        Scratch: TypedScratch<M>,
    {
        let mut typed = std::mem::take(self.scratch.typed());
        let mut work = std::mem::take(&mut self.scratch.work);
        self.update_with(s, model, zs, xy, t, stats, &mut typed, &mut work);
        *self.scratch.typed() = typed;
        self.scratch.work = work;
    }

    /// [`Tracker::update`] with its buffers taken out of the scratch space.
    #[allow(clippy::too_many_arguments)]
    fn update_with<const M: usize, Me: MeasurementModel<4, M>>(
        &mut self,
        s: usize,
        model: &Me,
        zs: &[SVector<f64, M>],
        xy: &[[f64; 2]],
        t: f64,
        stats: &mut ScanStats,
        typed: &mut Typed<M>,
        work: &mut Work,
    ) {
        let Typed {
            prepared,
            pairs,
            nus,
        } = typed;
        let Work {
            half_widths,
            parent,
            owner,
            first_pair,
            pair_count,
            by_root,
            members,
            beta0,
            beta,
            used,
            claimed,
            claimed_reported,
            rivals,
            promote,
            local,
            dets,
            pool,
            lns,
            ln_terms,
            ws,
        } = work;
        // Reported tracks come first, candidates after (see the end of this function).
        let reported_at_start = self.tracks.partition_point(|t| t.id != 0);
        let rt = &self.runtime[s];
        let gate = rt.gate;
        let pg = gate.probability();
        let gamma = gate.threshold();
        let n_tracks = self.tracks.len();
        // 1. Prepared updates and gate bounding boxes of the covered tracks.
        let linear = matches!(rt.model, Model::Cartesian(_));
        gate_records(
            &self.tracks,
            rt,
            model,
            gamma,
            linear,
            prepared,
            half_widths,
        );
        // 2. Spatial index with the median half-width as the cell size.
        let cell = if half_widths.is_empty() {
            100.0
        } else {
            let mid = half_widths.len() / 2;
            *half_widths
                .select_nth_unstable_by(mid, |a, b| a.total_cmp(b))
                .1
        };
        self.scratch.grid.rebuild(xy, cell.max(1.0));
        // 3. Gating: (track, detection, innovation, ln likelihood ratio, d²).
        pairs.clear();
        // ln P_D of the last track that needed it: P_D is the same for most tracks (constant,
        // or a rectangular field of view), so the logarithm is rarely taken again.
        let mut last_ln_pd = (f64::NAN, f64::NAN);
        for (ti, p) in prepared.iter().enumerate() {
            let Some(GateRecord {
                zhat,
                s_inv,
                det_s,
                pd,
                hw,
            }) = p
            else {
                continue;
            };
            let mut ln_det_s = det_s.1;
            let mut ln_pd = f64::NAN;
            let (x, y) = (
                self.tracks[ti].state.mean()[0],
                self.tracks[ti].state.mean()[1],
            );
            let cands = &mut self.scratch.candidates;
            cands.clear();
            self.scratch
                .grid
                .query(x - hw, y - hw, x + hw, y + hw, cands);
            if cands.len() > 1 {
                cands.sort_unstable();
            }
            for &j in cands.iter() {
                let nu = model.residual(&zs[j as usize], zhat);
                // d² = νᵀ S⁻¹ ν, as PreparedUpdate::d2.
                let d2 = (nu.transpose() * s_inv * nu)[(0, 0)];
                if gate.accepts(d2) {
                    if ln_det_s.is_nan() {
                        ln_det_s = det_s.0.ln();
                    }
                    if ln_pd.is_nan() {
                        if pd.to_bits() != last_ln_pd.0.to_bits() {
                            last_ln_pd = (*pd, pd.ln());
                        }
                        ln_pd = last_ln_pd.1;
                    }
                    let ln_lr = ln_pd + stats::normal_ln_from_parts(d2, ln_det_s, M) - rt.ln_kappa;
                    pairs.push((ti as u32, j, nu, ln_lr, d2));
                }
            }
        }
        // 4. Clusters by union–find over tracks sharing a detection.
        parent.clear();
        parent.extend(0..n_tracks as u32);
        fn find(p: &mut [u32], mut i: u32) -> u32 {
            while p[i as usize] != i {
                p[i as usize] = p[p[i as usize] as usize];
                i = p[i as usize];
            }
            i
        }
        // Only significant pairs link tracks into clusters: a pair whose hypothesis weight is
        // below LINK_MIN of its track's missed-detection weight changes the marginals of the
        // other tracks by less than that fraction, so it is left to its own track's cluster.
        let is_gnn = matches!(self.method, Method::Gnn);
        owner.clear();
        owner.resize(zs.len(), u32::MAX);
        // Per track with gated detections: (ln r, ln(1 − r P_D P_G)), the hypothesis weights'
        // common terms, taken once here (pairs come track by track) and read again in step 5.
        ln_terms.clear();
        ln_terms.resize(n_tracks, (f64::NAN, f64::NAN));
        let ln_link_min = LINK_MIN.ln();
        for &(ti, j, _, ln_lr, _) in pairs.iter() {
            let terms = &mut ln_terms[ti as usize];
            if terms.1.is_nan() {
                let tr = &self.tracks[ti as usize];
                let pd = prepared[ti as usize].as_ref().map_or(0.0, |p| p.pd);
                // JPDA weighs hypotheses with the existence probability (joint IPDA); GNN's
                // hard decision uses the plain likelihood ratio against 1 − P_D P_G, so that a
                // new track with a small existence still takes the detection that fits it.
                let r = if is_gnn { 1.0 } else { tr.existence };
                *terms = (r.ln(), (1.0 - r * pd * pg).ln());
            }
            let (ln_r, ln_miss) = *terms;
            if !is_gnn && ln_r + ln_lr - ln_miss < ln_link_min {
                continue;
            }
            let o = owner[j as usize];
            if o == u32::MAX {
                owner[j as usize] = ti;
            } else {
                let (a, b) = (find(parent, ti), find(parent, o));
                if a != b {
                    parent[a.max(b) as usize] = a.min(b);
                }
            }
        }
        // Pairs of each track, in order (pairs are generated track by track).
        first_pair.clear();
        first_pair.resize(n_tracks + 1, usize::MAX);
        pair_count.clear();
        pair_count.resize(n_tracks, 0);
        for (k, &(ti, ..)) in pairs.iter().enumerate() {
            if first_pair[ti as usize] == usize::MAX {
                first_pair[ti as usize] = k;
            }
            pair_count[ti as usize] += 1;
        }
        // Group tracks with gated detections by cluster root (sorted: deterministic order).
        by_root.clear();
        for ti in 0..n_tracks as u32 {
            if pair_count[ti as usize] > 0 {
                by_root.push((find(parent, ti), ti));
            }
        }
        by_root.sort_unstable();
        // 5. Associate each cluster; collect per-track marginals (missed, [(pair index, β)]).
        beta0.clear();
        beta0.resize(n_tracks, 1.0);
        beta.clear();
        beta.resize(pairs.len(), 0.0);
        used.clear();
        used.resize(zs.len(), 0.0);
        // Σ_t P(j is t's | t exists): a detection that some track would own if it exists seeds
        // no new candidate (otherwise every young, low-existence track would spawn a duplicate
        // of itself from its own detections).
        claimed.clear();
        claimed.resize(zs.len(), 0.0);
        claimed_reported.clear();
        claimed_reported.resize(zs.len(), 0.0);
        rivals.clear();
        promote.clear();
        local.clear();
        local.resize(zs.len(), u32::MAX);
        for group in by_root.chunk_by(|a, b| a.0 == b.0) {
            members.clear();
            members.extend(group.iter().map(|g| g.1));
            dets.clear();
            let mut n_cands = 0;
            for &ti in members.iter() {
                let (ln_r, ln_miss) = ln_terms[ti as usize];
                let range =
                    first_pair[ti as usize]..first_pair[ti as usize] + pair_count[ti as usize];
                lns.clear();
                lns.extend(pairs[range.clone()].iter().map(|p| ln_r + p.3));
                let mx = lns.iter().copied().fold(ln_miss, f64::max);
                let missed = (ln_miss - mx).exp();
                if members.len() == 1 {
                    // A lone track (the common case): its marginals straight into β, no
                    // candidate lists and no joint reasoning.
                    for (b, l) in beta[range.clone()].iter_mut().zip(lns.iter()) {
                        *b = (l - mx).exp();
                    }
                    beta0[ti as usize] =
                        assoc::lone_in_place(missed, &mut beta[range.clone()], self.method);
                    for (b, p) in beta[range.clone()].iter().zip(&pairs[range.clone()]) {
                        used[p.1 as usize] += *b;
                    }
                    stats.hypotheses += range.len() + 1;
                    continue;
                }
                if pool.len() == n_cands {
                    pool.push(Candidates::default());
                }
                let c = &mut pool[n_cands];
                n_cands += 1;
                c.missed = missed;
                c.options.clear();
                for (p, l) in pairs[range].iter().zip(lns.iter()) {
                    let j = p.1 as usize;
                    if local[j] == u32::MAX {
                        local[j] = dets.len() as u32;
                        dets.push(p.1);
                    }
                    c.options.push((local[j], (l - mx).exp()));
                }
            }
            stats.clusters += 1;
            stats.max_cluster_tracks = stats.max_cluster_tracks.max(members.len());
            if members.len() == 1 {
                continue;
            }
            let outcome = assoc::associate(
                &pool[..n_cands],
                dets.len(),
                self.method,
                &mut self.scratch.solver,
            );
            stats.hypotheses += outcome.hypotheses;
            stats.truncated_clusters += usize::from(outcome.truncated);
            for (&ti, m) in members.iter().zip(&outcome.marginals) {
                beta0[ti as usize] = m.missed;
                let start = first_pair[ti as usize];
                for (k, b) in m.options.iter().enumerate() {
                    beta[start + k] = *b;
                    used[pairs[start + k].1 as usize] += *b;
                }
            }
            for &j in dets.iter() {
                local[j as usize] = u32::MAX;
            }
        }
        // 6. State and existence updates.
        let mut health = ScanHealth {
            clutter: zs.len() as f64,
            ..ScanHealth::default()
        };
        let (nis_lo, nis_hi) = rt.nis_interval;
        let management = self.config.management;
        for ti in 0..n_tracks {
            let Some(&GateRecord { pd, .. }) = prepared[ti].as_ref() else {
                continue;
            };
            let tr = &mut self.tracks[ti];
            let r = tr.existence;
            let b0 = beta0[ti];
            let range = if pair_count[ti] > 0 {
                first_pair[ti]..first_pair[ti] + pair_count[ti]
            } else {
                0..0
            };
            let b_det: f64 = beta[range.clone()].iter().sum();
            // Existence: joint IPDA. For GNN the hard decision is turned into the IPDA update
            // with the assigned detection alone.
            let q = r * (1.0 - pd * pg) / (1.0 - r * pd * pg);
            let r_post = if is_gnn {
                let lr: f64 = pairs[range.clone()]
                    .iter()
                    .zip(&beta[range.clone()])
                    .filter(|(_, b)| **b > 0.5)
                    .map(|(p, _)| p.3.exp())
                    .sum();
                let delta = pd * pg - lr;
                ((1.0 - delta) * r / (1.0 - delta * r)).clamp(0.0, 1.0)
            } else {
                (b_det + b0 * q).clamp(0.0, 1.0)
            };
            // Conditional (given existence) weights for the state update.
            let (w0, scale) = if is_gnn {
                (b0, 1.0)
            } else if r_post > 0.0 {
                (b0 * q / r_post, 1.0 / r_post)
            } else {
                (1.0, 0.0)
            };
            nus.clear();
            nus.extend(pairs[range.clone()].iter().map(|p| p.2));
            ws.clear();
            ws.push(w0);
            ws.extend(beta[range.clone()].iter().map(|b| b * scale));
            let wsum: f64 = ws.iter().sum();
            if wsum > 0.0 {
                ws.iter_mut().for_each(|w| *w /= wsum);
            }
            // A candidate whose most likely detection is already claimed by a reported track
            // is that track's echo, not a new object: it is dropped before it can be reported.
            // Candidates that most likely hold the same detection are rival versions of one
            // object: only the most probable stays (decided after this loop).
            let mut best_det = None;
            if tr.id == 0 {
                let best = ws[1..]
                    .iter()
                    .zip(&pairs[range.clone()])
                    .max_by(|a, b| a.0.total_cmp(b.0));
                if let Some((w, p)) = best
                    && *w > 0.5
                {
                    if claimed_reported[p.1 as usize] >= 0.5 {
                        tr.duplicate = true;
                    } else {
                        best_det = Some(p.1);
                    }
                }
            }
            let reported = tr.id != 0;
            for (w, p) in ws[1..].iter().zip(&pairs[range.clone()]) {
                claimed[p.1 as usize] += w;
                if reported {
                    claimed_reported[p.1 as usize] += w;
                }
            }
            // With no gated detection (or none with weight) the prediction stands.
            if !nus.is_empty()
                && ws[0] < 1.0
                && let Ok(prep) = tr.state.prepare(model)
            {
                tr.state = pda_combine(&tr.state, &prep, nus, ws);
            }
            tr.existence = r_post;
            if let Some(j) = best_det {
                rivals.push((j, r_post, ti as u32));
            }
            tr.age += 1;
            // Detected, given that the object exists: 1 − (conditional missed weight).
            let detected = 1.0 - w0 > 0.5;
            tr.history = (tr.history << 1) | u32::from(detected);
            tr.covered = (tr.covered + 1).min(32);
            if detected {
                tr.misses = 0;
                tr.last_update = t;
                tr.sensors.insert(s);
            } else {
                tr.misses += 1;
            }
            match management {
                Management::Existence { confirm, .. } => {
                    if tr.existence >= confirm {
                        tr.status = TrackStatus::Confirmed;
                    }
                }
                Management::MOfN { m, n, .. } => {
                    let seen = tr.covered.min(n);
                    if (tr.history & mask(seen)).count_ones() >= m {
                        tr.status = TrackStatus::Confirmed;
                    }
                }
            }
            // A candidate becomes a reported track (and gets its id) when the evidence favours
            // an object over clutter (see [`TENTATIVE_ODDS_RISE`]), or when it is confirmed
            // outright; under M-of-N management, with its second detection.
            let reportable = match management {
                Management::Existence { .. } => {
                    detected && odds(tr.existence) > TENTATIVE_ODDS_RISE * odds(tr.birth_existence)
                }
                Management::MOfN { .. } => detected && tr.existence > tr.birth_existence,
            };
            if tr.id == 0 && !tr.duplicate && (reportable || tr.status == TrackStatus::Confirmed) {
                promote.push(ti as u32);
            }
            if tr.status == TrackStatus::Confirmed {
                health.clutter -= b_det;
                health.detected += 1.0 - b0;
                health.covered += 1.0;
                if let Some((k, b)) = beta[range.clone()]
                    .iter()
                    .enumerate()
                    .max_by(|a, b| a.1.total_cmp(b.1))
                {
                    if *b > 0.5 {
                        let d2 = pairs[range.start + k].4;
                        health.nis_sum += d2;
                        health.nis_count += 1;
                        health.nis_outside += u32::from(d2 < nis_lo || d2 > nis_hi);
                    }
                }
            }
        }
        // Rival candidates: per detection, the most probable keeps it (ties: the older index).
        rivals.sort_unstable_by(|a, b| a.0.cmp(&b.0).then(b.1.total_cmp(&a.1)).then(a.2.cmp(&b.2)));
        for pair in rivals.windows(2) {
            if pair[0].0 == pair[1].0 {
                self.tracks[pair[1].2 as usize].duplicate = true;
            }
        }
        // Promotion in index order, so that ids are deterministic.
        for &ti in promote.iter() {
            let tr = &mut self.tracks[ti as usize];
            if !tr.duplicate {
                tr.id = self.next_id;
                self.next_id += 1;
                stats.births += 1;
            }
        }
        // Tracks not covered still age in M-of-N terms only when covered, so nothing to do.
        // 7. Births from detections no track explains.
        let birth_share = rt.birth_share;
        let position = match rt.model {
            Model::Cartesian(_) => None,
            Model::Polar(m) => Some((m.position, m.sigma_range(), m.sigma_bearing())),
            Model::PolarRate(m) => Some((
                m.polar.position,
                m.polar.sigma_range(),
                m.polar.sigma_bearing(),
            )),
        };
        let noise = model.noise();
        let vel_var = self.config.initial_velocity_std.powi(2);
        for (j, z) in zs.iter().enumerate() {
            if used[j] >= 0.5 || claimed[j] >= 0.5 {
                continue;
            }
            if self.tracks.len() >= MAX_TRACKS {
                stats.births_refused += 1;
                continue;
            }
            let r0 = (1.0 - used[j]) * birth_share;
            let (mean, pos_cov) = match position {
                None => (
                    Vector2::new(z[0], z[1]),
                    nalgebra::Matrix2::new(
                        noise[(0, 0)],
                        noise[(0, 1)],
                        noise[(1, 0)],
                        noise[(1, 1)],
                    ),
                ),
                Some((origin, sr, sb)) => {
                    match polar_to_cartesian(origin, z[0], z[1], sr, sb, Conversion::Unbiased) {
                        Ok(v) => v,
                        Err(_) => continue,
                    }
                }
            };
            let mut cov = Matrix4::zeros();
            cov.fixed_view_mut::<2, 2>(0, 0).copy_from(&pos_cov);
            cov[(2, 2)] = vel_var;
            cov[(3, 3)] = vel_var;
            // The position block is a measurement covariance (positive definite by the sensor's
            // validated noise), the velocity block diagonal: no general PSD check is needed.
            let det = pos_cov[(0, 0)] * pos_cov[(1, 1)] - pos_cov[(0, 1)] * pos_cov[(1, 0)];
            if !(mean.iter().all(|v| v.is_finite())
                && pos_cov[(0, 0)] > 0.0
                && det > 0.0
                && det.is_finite())
            {
                continue;
            }
            let state = Gaussian::from_parts(Vector4::new(mean[0], mean[1], 0.0, 0.0), cov);
            self.tracks.push(Track {
                id: 0,
                state,
                existence: r0,
                status: TrackStatus::Tentative,
                last_update: t,
                sensors: [s].into_iter().collect(),
                history: 1,
                covered: 1,
                misses: 0,
                age: 0,
                birth_existence: r0,
                duplicate: false,
            });
        }
        // Keep reported tracks in front of candidates: promoted candidates move to the end of
        // the reported block (a swap each). Candidates are born and dropped every scan; with
        // them at the back, removing them moves only the short candidate block, not every
        // track (which dominated the cost of large scans).
        let mut boundary = reported_at_start;
        for i in reported_at_start..self.tracks.len() {
            if self.tracks[i].id != 0 {
                self.tracks.swap(i, boundary);
                boundary += 1;
            }
        }
        let rt = &mut self.runtime[s];
        rt.health.push(health);
    }
}

/// Step 1 of a scan: per track, what gating needs ([`GateRecord`]; `None` for a track outside
/// the sensor's field of view or whose innovation covariance is not positive definite), and
/// the half-widths (m, in the site plane) of the covered tracks' gate boxes. `gamma` is the
/// gate's threshold on d² (the chi-square quantile of the gate probability).
///
/// With `share` (only for a linear measurement model, where S = H P Hᵀ + R, hence S⁻¹, det S
/// and the half-width, depends on the covariance alone) a track whose covariance holds the same
/// bits as that of the last track prepared in full takes that track's record with ẑ = H x and
/// P_D of its own: the same numbers without the work. Candidates born in one scan that have
/// gated nothing since carry identical covariances and sit next to each other, and in dense
/// clutter they are most of the tracks.
fn gate_records<const M: usize, Me: MeasurementModel<4, M>>(
    tracks: &[Track],
    rt: &SensorRuntime,
    model: &Me,
    gamma: f64,
    share: bool,
    prepared: &mut Vec<Option<GateRecord<M>>>,
    half_widths: &mut Vec<f64>,
) {
    debug_assert!(
        !share || matches!(rt.model, Model::Cartesian(_)),
        "gate records are shared only under a linear measurement model"
    );
    prepared.clear();
    half_widths.clear();
    let mut last_full: Option<usize> = None;
    for (ti, tr) in tracks.iter().enumerate() {
        let (x, y) = (tr.state.mean()[0], tr.state.mean()[1]);
        if !rt.region.contains(x, y) {
            prepared.push(None);
            continue;
        }
        let pd = match rt.region {
            Region::Sector { origin, .. } => rt.pd.at_range((x - origin[0]).hypot(y - origin[1])),
            Region::Rect { .. } => rt.pd.at_range(0.0),
        };
        if share
            && let Some(k) = last_full
            && let Some(rec) = prepared[k]
            && same_bits(tracks[k].state.cov(), tr.state.cov())
        {
            half_widths.push(rec.hw);
            prepared.push(Some(GateRecord {
                zhat: model.predict(tr.state.mean()),
                pd,
                ..rec
            }));
            continue;
        }
        let Ok(prep) = tr.state.prepare(model) else {
            prepared.push(None);
            continue;
        };
        last_full = Some(ti);
        let hw = match rt.model {
            Model::Cartesian(_) => (gamma * prep.s[(0, 0)].max(prep.s[(1, 1)])).sqrt(),
            // |Δxy| ≤ |Δr| + r |Δb| (chord ≤ arc), with the gate's range and bearing extents.
            Model::Polar(_) | Model::PolarRate(_) => {
                let dr = (gamma * prep.s[(0, 0)]).sqrt();
                let db = (gamma * prep.s[(1, 1)]).sqrt().min(std::f64::consts::PI);
                dr + (prep.zhat[0] + dr) * db
            }
        };
        half_widths.push(hw);
        prepared.push(Some(GateRecord {
            zhat: prep.zhat,
            s_inv: prep.s_inv,
            det_s: prep.det_parts(),
            pd,
            hw,
        }));
    }
}

/// Whether two matrices hold the same bits (so that every function of them gives the same
/// result; `==` would equate 0.0 and −0.0).
#[inline]
fn same_bits<const R: usize, const C: usize>(
    a: &nalgebra::SMatrix<f64, R, C>,
    b: &nalgebra::SMatrix<f64, R, C>,
) -> bool {
    a.iter()
        .zip(b.iter())
        .fold(true, |same, (x, y)| same & (x.to_bits() == y.to_bits()))
}

fn mask(bits: u32) -> u32 {
    if bits >= 32 {
        u32::MAX
    } else {
        (1u32 << bits) - 1
    }
}

/// Measurement vectors (r, b[, ṙ]) in radians and site-plane positions of polar detections.
fn polar_vectors<const M: usize>(
    dets: &[Measurement],
    origin: [f64; 2],
) -> (Vec<SVector<f64, M>>, Vec<[f64; 2]>) {
    let mut zs = Vec::with_capacity(dets.len());
    let mut xy = Vec::with_capacity(dets.len());
    for d in dets {
        if let Measurement::Polar {
            range,
            bearing_deg,
            range_rate,
        } = *d
        {
            let b = bearing_deg
                .to_radians()
                .rem_euclid(2.0 * std::f64::consts::PI);
            let mut z = SVector::<f64, M>::zeros();
            z[0] = range;
            z[1] = b;
            if M == 3 {
                z[M - 1] = range_rate.unwrap_or(0.0);
            }
            zs.push(z);
            let (sb, cb) = b.sin_cos();
            xy.push([origin[0] + range * sb, origin[1] + range * cb]);
        }
    }
    (zs, xy)
}

fn view(tr: &Track) -> TrackView {
    let m = tr.state.mean();
    let p = tr.state.cov();
    let mut covariance = [[0.0; 4]; 4];
    for (i, row) in covariance.iter_mut().enumerate() {
        for (j, v) in row.iter_mut().enumerate() {
            *v = p[(i, j)];
        }
    }
    TrackView {
        id: tr.id,
        status: tr.status,
        state: [m[0], m[1], m[2], m[3]],
        covariance,
        existence: tr.existence,
        last_update: tr.last_update,
        sensors: tr.sensors,
    }
}

#[cfg(test)]
mod tests;
