//! Shared fixtures of the filter-core integration tests: invented scenarios, a Kalman filter
//! that is told the true association (the yardstick), and GOSPA scoring of a run.
#![allow(dead_code, unreachable_pub)]

use filter_core::gaussian::Gaussian;
use filter_core::gospa::{GospaParams, gospa};
use filter_core::measurement::{Conversion, MeasurementModel, RangeBearing, polar_to_cartesian};
use filter_core::motion::{ConstantVelocity, MotionModel};
use filter_core::sim::{Leg, Scenario, SimScan, SimSensor, SimTarget, Simulator};
use filter_core::tracker::*;
use nalgebra::{Matrix4, Vector2, Vector4};

/// A polar harbour radar at the site origin covering 6 km all round.
pub fn radar(id: &str, x: f64, y: f64, pd: f64, clutter: f64) -> SensorConfig {
    SensorConfig {
        id: id.into(),
        kind: SensorKind::Polar {
            x,
            y,
            sigma_range: 10.0,
            sigma_bearing_deg: 0.2,
            sigma_range_rate: None,
        },
        fov: FieldOfView::Sector {
            min_range: 100.0,
            max_range: 6000.0,
            bearing_start_deg: 0.0,
            bearing_extent_deg: 360.0,
        },
        detection_probability: pd,
        clutter_rate: clutter,
        birth_rate: 0.1,
    }
}

/// Twelve invented vessels with staggered births and deaths over 600 s, inside 5 km.
pub fn twelve_vessels() -> Vec<SimTarget> {
    let mut v = Vec::new();
    for k in 0..12 {
        let a = (k as f64) * 30f64.to_radians();
        let r0 = 1500.0 + 250.0 * (k % 4) as f64;
        let speed = 4.0 + (k % 5) as f64;
        let heading = a + 100f64.to_radians();
        let legs = if k % 3 == 0 {
            vec![
                Leg::Straight { duration: 120.0 },
                Leg::Turn {
                    duration: 30.0,
                    rate_deg_s: 2.0,
                },
            ]
        } else {
            vec![]
        };
        v.push(SimTarget {
            name: format!("vessel-{k:02}"),
            birth: 20.0 * (k % 6) as f64,
            death: 600.0 - 25.0 * (k % 5) as f64,
            initial: [
                r0 * a.sin(),
                r0 * a.cos(),
                speed * heading.sin(),
                speed * heading.cos(),
            ],
            legs,
        });
    }
    v
}

pub fn scenario(
    sensors: Vec<SimSensor>,
    targets: Vec<SimTarget>,
    duration: f64,
    seed: u64,
) -> Scenario {
    Scenario {
        sensors,
        targets,
        start: 1_800_000_000.0,
        duration: Some(duration),
        seed,
    }
}

pub fn sim_sensor(config: SensorConfig, period: f64, offset: f64) -> SimSensor {
    SimSensor {
        config,
        period,
        offset,
    }
}

/// Run the tracker over the scenario; returns, per scan, the truth and the pictures.
pub fn run(config: TrackerConfig, sc: &Scenario) -> Vec<(SimScan, Picture)> {
    let sensors: Vec<SensorConfig> = sc.sensors.iter().map(|s| s.config.clone()).collect();
    let mut tracker = Tracker::new(config, sensors).expect("valid tracker config");
    let mut out = Vec::new();
    for s in Simulator::new(sc).expect("valid scenario") {
        let pics = tracker.submit(s.scan.clone()).expect("scan accepted");
        assert_eq!(pics.len(), 1, "reorder window 0 releases each scan at once");
        out.push((s, pics.into_iter().next().unwrap()));
    }
    out
}

/// Mean GOSPA (c, p = 2, α = 2) of confirmed tracks against the truth over all scans after
/// `skip` seconds.
pub fn mean_gospa(run: &[(SimScan, Picture)], c: f64, skip: f64) -> f64 {
    let params = GospaParams::new(c, 2.0).unwrap();
    let t0 = run.first().map(|r| r.1.time).unwrap_or(0.0);
    let mut sum = 0.0;
    let mut n = 0;
    for (s, p) in run {
        if p.time - t0 < skip {
            continue;
        }
        let truth: Vec<[f64; 2]> = s.truth.iter().map(|(_, x)| [x[0], x[1]]).collect();
        let est: Vec<[f64; 2]> = p
            .tracks
            .iter()
            .filter(|t| t.status == TrackStatus::Confirmed)
            .map(|t| [t.state[0], t.state[1]])
            .collect();
        sum += gospa(&truth, &est, &params).unwrap().distance;
        n += 1;
    }
    sum / n as f64
}

/// The yardstick: one constant-velocity Kalman filter per target, fed only that target's own
/// detections (the simulator's truth association), started by the same single-point
/// initiation as the tracker. Estimates of a target are shown from its second detection on.
/// Returns the mean GOSPA under the same scoring as [`mean_gospa`].
pub fn known_association_gospa(sc: &Scenario, config: &TrackerConfig, c: f64, skip: f64) -> f64 {
    // Replay the simulator with clutter switched off but the same seed would change the random
    // stream, so instead detect target-originated measurements by nearest truth within 5 σ.
    let params = GospaParams::new(c, 2.0).unwrap();
    let cv = ConstantVelocity::continuous(config.process_noise).unwrap();
    let mut filters: Vec<Option<(Gaussian<4>, f64, u32)>> = vec![None; sc.targets.len()];
    let t0 = sc.start;
    let mut sum = 0.0;
    let mut n = 0;
    for s in Simulator::new(&clean(sc)).unwrap() {
        let cfg = &sc.sensors[s.scan.sensor].config;
        let SensorKind::Polar {
            x: sx,
            y: sy,
            sigma_range,
            sigma_bearing_deg,
            ..
        } = cfg.kind
        else {
            panic!("polar only")
        };
        let model = RangeBearing::new([sx, sy], sigma_range, sigma_bearing_deg).unwrap();
        let t = s.scan.time;
        for (k, target) in sc.targets.iter().enumerate() {
            let alive = s.truth.iter().any(|(name, _)| *name == target.name);
            if !alive {
                filters[k] = None;
                continue;
            }
            if let Some((g, tl, _)) = filters[k].as_mut() {
                *g = cv.predict(g, t - *tl).unwrap();
                *tl = t;
            }
        }
        // In the clean replay every detection is target-originated; match it to its target.
        for d in &s.scan.detections {
            let Measurement::Polar {
                range, bearing_deg, ..
            } = *d
            else {
                continue;
            };
            let b = bearing_deg.to_radians();
            let (zx, zy) = (sx + range * b.sin(), sy + range * b.cos());
            let k = s
                .truth
                .iter()
                .enumerate()
                .min_by(|a, b| {
                    let da = (a.1.1[0] - zx).hypot(a.1.1[1] - zy);
                    let db = (b.1.1[0] - zx).hypot(b.1.1[1] - zy);
                    da.total_cmp(&db)
                })
                .map(|(i, _)| i)
                .unwrap();
            let name = &s.truth[k].0;
            let ti = sc.targets.iter().position(|tg| &tg.name == name).unwrap();
            let z = Vector2::new(range, b);
            match filters[ti].as_mut() {
                None => {
                    let (m, pc) = polar_to_cartesian(
                        [sx, sy],
                        range,
                        b,
                        sigma_range,
                        sigma_bearing_deg.to_radians(),
                        Conversion::Unbiased,
                    )
                    .unwrap();
                    let mut cov = Matrix4::zeros();
                    cov.fixed_view_mut::<2, 2>(0, 0).copy_from(&pc);
                    cov[(2, 2)] = config.initial_velocity_std.powi(2);
                    cov[(3, 3)] = config.initial_velocity_std.powi(2);
                    filters[ti] = Some((
                        Gaussian::new(Vector4::new(m[0], m[1], 0.0, 0.0), cov).unwrap(),
                        t,
                        1,
                    ));
                }
                Some((g, _, hits)) => {
                    let prep = g.prepare::<2, _>(&model).unwrap();
                    let nu =
                        <RangeBearing as MeasurementModel<4, 2>>::residual(&model, &z, &prep.zhat);
                    *g = prep.apply(g, &nu);
                    *hits += 1;
                }
            }
        }
        if t - t0 >= skip {
            let truth: Vec<[f64; 2]> = s.truth.iter().map(|(_, x)| [x[0], x[1]]).collect();
            let est: Vec<[f64; 2]> = filters
                .iter()
                .flatten()
                .filter(|f| f.2 >= 2)
                .map(|f| [f.0.mean()[0], f.0.mean()[1]])
                .collect();
            sum += gospa(&truth, &est, &params).unwrap().distance;
            n += 1;
        }
    }
    sum / n as f64
}

/// The same scenario without clutter (P_D and noise unchanged; the seed gives a different but
/// equally distributed draw).
pub fn clean(sc: &Scenario) -> Scenario {
    let mut c = sc.clone();
    for s in &mut c.sensors {
        s.config.clutter_rate = 0.0;
    }
    c
}
