//! Seeded scenario simulator: scans drawn from the same measurement model the tracker assumes.
//!
//! Targets fly deterministic trajectories made of legs of constant velocity and coordinated
//! turns, between a birth and a death time. Each sensor scans with its own period and offset;
//! in each scan every live target inside the field of view is detected with probability P_D
//! and measured with Gaussian noise (polar: range, bearing and optionally range rate; cartesian:
//! x, y), clutter is Poisson with mean λ̄_c, uniform over the field of view in measurement space
//! (range and bearing for a polar sensor, range rate uniform over ±50 m/s), and the detections
//! are shuffled. The same seed gives the same scans, bit for bit.
//!
//! Turn rates in scenarios are positive **clockwise** (a right turn, the direction in which
//! bearings increase).

use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;
use rand_distr::{Distribution, Normal, Poisson};

use crate::clutter::Region;
use crate::error::{Error, Result, check_non_negative, check_positive};
use crate::motion::{CoordinatedTurn, MotionModel};
use crate::tracker::{FieldOfView, Measurement, Scan, SensorConfig, SensorKind};

/// A simulated sensor: its configuration (the truth of its P_D, clutter and noise) and timing.
#[derive(Debug, Clone, PartialEq)]
pub struct SimSensor {
    /// Configuration; the simulator draws from exactly these parameters.
    pub config: SensorConfig,
    /// Scan period (s, > 0).
    pub period: f64,
    /// Time of the first scan after the scenario start (s, ≥ 0).
    pub offset: f64,
}

/// One leg of a target's trajectory.
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum Leg {
    /// Constant velocity for `duration` seconds.
    Straight {
        /// Seconds.
        duration: f64,
    },
    /// Coordinated turn at `rate_deg_s` (degrees per second, positive clockwise) for
    /// `duration` seconds.
    Turn {
        /// Seconds.
        duration: f64,
        /// Degrees per second, positive clockwise.
        rate_deg_s: f64,
    },
}

/// A target: alive on [birth, death) (seconds after the scenario start), starting at
/// `initial` = (x, y, vx, vy) (m, m/s) and following `legs`, then straight.
#[derive(Debug, Clone, PartialEq)]
pub struct SimTarget {
    /// Name, for the truth file.
    pub name: String,
    /// Birth time (s after start).
    pub birth: f64,
    /// Death time (s after start).
    pub death: f64,
    /// State at birth.
    pub initial: [f64; 4],
    /// Trajectory legs from birth on.
    pub legs: Vec<Leg>,
}

/// A scenario.
#[derive(Debug, Clone, PartialEq)]
pub struct Scenario {
    /// Sensors.
    pub sensors: Vec<SimSensor>,
    /// Targets.
    pub targets: Vec<SimTarget>,
    /// Absolute time of the start (s, e.g. UNIX seconds).
    pub start: f64,
    /// Length (s); `None` runs forever.
    pub duration: Option<f64>,
    /// Random seed.
    pub seed: u64,
}

impl Scenario {
    /// Validate the scenario.
    pub fn validate(&self) -> Result<()> {
        if self.sensors.is_empty() {
            return Err(Error::param("scenario needs at least one sensor"));
        }
        for s in &self.sensors {
            s.config.validate()?;
            check_positive(&format!("sensor {} scan period (s)", s.config.id), s.period)?;
            check_non_negative(&format!("sensor {} scan offset (s)", s.config.id), s.offset)?;
        }
        if let Some(d) = self.duration {
            check_positive("scenario duration (s)", d)?;
        }
        if !self.start.is_finite() {
            return Err(Error::param("scenario start time must be finite"));
        }
        for t in &self.targets {
            if !(t.birth.is_finite() && t.death.is_finite() && t.birth < t.death) {
                return Err(Error::param(format!(
                    "target {}: birth must be before death, got {} and {}",
                    t.name, t.birth, t.death
                )));
            }
            if t.initial.iter().any(|v| !v.is_finite()) {
                return Err(Error::param(format!(
                    "target {}: initial state must be finite",
                    t.name
                )));
            }
            for l in &t.legs {
                let (d, r) = match *l {
                    Leg::Straight { duration } => (duration, 0.0),
                    Leg::Turn {
                        duration,
                        rate_deg_s,
                    } => (duration, rate_deg_s),
                };
                if !(d.is_finite() && d >= 0.0 && r.is_finite()) {
                    return Err(Error::param(format!(
                        "target {}: legs need finite, non-negative durations and finite rates",
                        t.name
                    )));
                }
            }
        }
        Ok(())
    }
}

/// True state (x, y, vx, vy) of a target `t_rel` seconds after the scenario start, or `None`
/// when it is not alive then.
pub fn target_state(target: &SimTarget, t_rel: f64) -> Option<[f64; 4]> {
    if t_rel < target.birth || t_rel >= target.death {
        return None;
    }
    let ct = CoordinatedTurn::new(0.0, 0.0).ok()?;
    let mut x = nalgebra::SVector::<f64, 5>::new(
        target.initial[0],
        target.initial[1],
        target.initial[2],
        target.initial[3],
        0.0,
    );
    let mut left = t_rel - target.birth;
    for leg in &target.legs {
        let (d, rate) = match *leg {
            Leg::Straight { duration } => (duration, 0.0),
            Leg::Turn {
                duration,
                rate_deg_s,
            } => (duration, rate_deg_s),
        };
        let step = d.min(left);
        // clockwise positive here, counter-clockwise positive in the CT model
        x[4] = -rate.to_radians();
        x = ct.transition(&x, step);
        left -= step;
        if left <= 0.0 {
            break;
        }
    }
    if left > 0.0 {
        x[4] = 0.0;
        x = ct.transition(&x, left);
    }
    Some([x[0], x[1], x[2], x[3]])
}

/// One simulated scan with the truth at its time.
#[derive(Debug, Clone, PartialEq)]
pub struct SimScan {
    /// The scan (tag = per-sensor sequence number from 1).
    pub scan: Scan,
    /// (target name, true state) of every live target at the scan time.
    pub truth: Vec<(String, [f64; 4])>,
}

/// Iterator over the scans of a scenario, in time order (ties by sensor index).
#[derive(Debug)]
pub struct Simulator {
    scenario: Scenario,
    rng: ChaCha8Rng,
    next_scan: Vec<u64>,
    /// Each sensor's field of view, resolved once (the same test the tracker uses).
    regions: Vec<Region>,
}

impl Simulator {
    /// A simulator for a validated scenario.
    pub fn new(scenario: &Scenario) -> Result<Self> {
        scenario.validate()?;
        let regions = scenario
            .sensors
            .iter()
            .map(|s| s.config.region())
            .collect::<Result<_>>()?;
        Ok(Self {
            regions,
            rng: ChaCha8Rng::seed_from_u64(scenario.seed),
            next_scan: vec![0; scenario.sensors.len()],
            scenario: scenario.clone(),
        })
    }

    fn scan_time(&self, s: usize) -> f64 {
        let ss = &self.scenario.sensors[s];
        ss.offset + ss.period * self.next_scan[s] as f64
    }
}

fn sample_clutter(rng: &mut ChaCha8Rng, cfg: &SensorConfig) -> Vec<Measurement> {
    let n = if cfg.clutter_rate > 0.0 {
        Poisson::new(cfg.clutter_rate)
            .map(|p| p.sample(rng) as usize)
            .unwrap_or(0)
    } else {
        0
    };
    let mut out = Vec::with_capacity(n);
    for _ in 0..n {
        let m = match (cfg.kind, cfg.fov) {
            (
                SensorKind::Cartesian { .. },
                FieldOfView::Rect {
                    x_min,
                    x_max,
                    y_min,
                    y_max,
                },
            ) => Measurement::Cartesian {
                x: rng.random_range(x_min..x_max),
                y: rng.random_range(y_min..y_max),
            },
            (
                SensorKind::Polar {
                    sigma_range_rate, ..
                },
                FieldOfView::Sector {
                    min_range,
                    max_range,
                    bearing_start_deg,
                    bearing_extent_deg,
                },
            ) => Measurement::Polar {
                range: rng.random_range(min_range..max_range),
                bearing_deg: (bearing_start_deg + rng.random_range(0.0..bearing_extent_deg))
                    .rem_euclid(360.0),
                range_rate: sigma_range_rate.map(|_| rng.random_range(-50.0..50.0)),
            },
            _ => continue,
        };
        out.push(m);
    }
    out
}

impl Iterator for Simulator {
    type Item = SimScan;

    fn next(&mut self) -> Option<SimScan> {
        let s = (0..self.scenario.sensors.len()).min_by(|&a, &b| {
            self.scan_time(a)
                .total_cmp(&self.scan_time(b))
                .then(a.cmp(&b))
        })?;
        let t_rel = self.scan_time(s);
        if self.scenario.duration.is_some_and(|d| t_rel > d) {
            return None;
        }
        self.next_scan[s] += 1;
        let cfg = self.scenario.sensors[s].config.clone();
        let mut detections = Vec::new();
        let mut truth = Vec::new();
        for target in &self.scenario.targets {
            let Some(x) = target_state(target, t_rel) else {
                continue;
            };
            truth.push((target.name.clone(), x));
            if !self.regions[s].contains(x[0], x[1])
                || self.rng.random::<f64>() >= cfg.detection_probability
            {
                continue;
            }
            let m = match cfg.kind {
                SensorKind::Cartesian { sigma } => {
                    let n = Normal::new(0.0, sigma).ok()?;
                    Measurement::Cartesian {
                        x: x[0] + n.sample(&mut self.rng),
                        y: x[1] + n.sample(&mut self.rng),
                    }
                }
                SensorKind::Polar {
                    x: sx,
                    y: sy,
                    sigma_range,
                    sigma_bearing_deg,
                    sigma_range_rate,
                } => {
                    let (dx, dy) = (x[0] - sx, x[1] - sy);
                    let r = dx.hypot(dy);
                    let b = dx.atan2(dy).to_degrees();
                    let nr = Normal::new(0.0, sigma_range).ok()?;
                    let nb = Normal::new(0.0, sigma_bearing_deg).ok()?;
                    let range = (r + nr.sample(&mut self.rng)).max(0.0);
                    let bearing_deg = (b + nb.sample(&mut self.rng)).rem_euclid(360.0);
                    let range_rate = match sigma_range_rate {
                        Some(sv) => {
                            let nv = Normal::new(0.0, sv).ok()?;
                            Some((dx * x[2] + dy * x[3]) / r.max(1e-9) + nv.sample(&mut self.rng))
                        }
                        None => None,
                    };
                    Measurement::Polar {
                        range,
                        bearing_deg,
                        range_rate,
                    }
                }
            };
            detections.push(m);
        }
        detections.extend(sample_clutter(&mut self.rng, &cfg));
        // Fisher–Yates shuffle: the scan is an unordered set.
        for i in (1..detections.len()).rev() {
            let j = self.rng.random_range(0..=i);
            detections.swap(i, j);
        }
        Some(SimScan {
            scan: Scan {
                sensor: s,
                time: self.scenario.start + t_rel,
                tag: self.next_scan[s],
                detections,
            },
            truth,
        })
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn radar() -> SimSensor {
        SimSensor {
            config: SensorConfig {
                id: "r".into(),
                kind: SensorKind::Polar {
                    x: 0.0,
                    y: 0.0,
                    sigma_range: 10.0,
                    sigma_bearing_deg: 0.5,
                    sigma_range_rate: None,
                },
                fov: FieldOfView::Sector {
                    min_range: 0.0,
                    max_range: 6000.0,
                    bearing_start_deg: 0.0,
                    bearing_extent_deg: 360.0,
                },
                detection_probability: 0.9,
                clutter_rate: 25.0,
                birth_rate: 0.05,
            },
            period: 2.0,
            offset: 0.0,
        }
    }

    #[test]
    fn same_seed_same_scans_and_clutter_count_is_poisson_mean() {
        let sc = Scenario {
            sensors: vec![radar()],
            targets: vec![],
            start: 1000.0,
            duration: Some(2000.0),
            seed: 3,
        };
        let a: Vec<SimScan> = Simulator::new(&sc).unwrap().collect();
        let b: Vec<SimScan> = Simulator::new(&sc).unwrap().collect();
        assert_eq!(a, b);
        assert_eq!(a.len(), 1001);
        let mean = a.iter().map(|s| s.scan.detections.len()).sum::<usize>() as f64 / a.len() as f64;
        // Poisson(25) over 1001 scans: the standard error of the mean is 5/√1001 ≈ 0.16; 4 σ.
        assert!((mean - 25.0).abs() < 0.64, "{mean}");
        assert_eq!(a[0].scan.tag, 1);
        assert_eq!(a[1].scan.time, 1002.0);
    }

    #[test]
    fn turn_legs_follow_circles_clockwise_positive() {
        // 10 m/s north, then a clockwise turn at 9°/s for 20 s (180°) ends heading south,
        // 2 r = 2 · v / ω = 2 · 10 / (π/20) ≈ 127.32 m to the east.
        let t = SimTarget {
            name: "a".into(),
            birth: 0.0,
            death: 100.0,
            initial: [0.0, 0.0, 0.0, 10.0],
            legs: vec![Leg::Turn {
                duration: 20.0,
                rate_deg_s: 9.0,
            }],
        };
        let x = target_state(&t, 20.0).unwrap();
        assert!((x[0] - 2.0 * 10.0 / (9f64.to_radians())).abs() < 1e-9 && x[1].abs() < 1e-9);
        assert!((x[3] + 10.0).abs() < 1e-9);
        assert!(target_state(&t, 100.0).is_none());
        let y = target_state(&t, 30.0).unwrap();
        assert!((y[1] + 100.0).abs() < 1e-9);
    }

    #[test]
    fn detection_rate_matches_pd() {
        let mut s = radar();
        s.config.clutter_rate = 0.0;
        let t = SimTarget {
            name: "a".into(),
            birth: 0.0,
            death: 1e9,
            initial: [1000.0, 1000.0, 0.0, 0.0],
            legs: vec![],
        };
        let sc = Scenario {
            sensors: vec![s],
            targets: vec![t],
            start: 0.0,
            duration: Some(4000.0),
            seed: 9,
        };
        let n: usize = Simulator::new(&sc)
            .unwrap()
            .map(|s| s.scan.detections.len())
            .sum();
        // Binomial(2001, 0.9): sd ≈ 13.4; 4 sd.
        assert!((n as f64 - 0.9 * 2001.0).abs() < 54.0, "{n}");
    }
}
