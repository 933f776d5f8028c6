//! Unit and property tests of the tracker: ordering and the reorder window, ids, runtime
//! parameter changes, M-of-N management, and invariants over arbitrary scan sequences.

use super::*;
use proptest::prelude::*;

fn camera() -> SensorConfig {
    SensorConfig {
        id: "quay-camera".into(),
        kind: SensorKind::Cartesian { sigma: 3.0 },
        fov: FieldOfView::Rect {
            x_min: -2000.0,
            x_max: 2000.0,
            y_min: -2000.0,
            y_max: 2000.0,
        },
        detection_probability: 0.9,
        clutter_rate: 1.0,
        birth_rate: 0.05,
    }
}

fn radar() -> SensorConfig {
    SensorConfig {
        id: "spit-radar".into(),
        kind: SensorKind::Polar {
            x: 0.0,
            y: -500.0,
            sigma_range: 8.0,
            sigma_bearing_deg: 0.3,
            sigma_range_rate: None,
        },
        fov: FieldOfView::Sector {
            min_range: 0.0,
            max_range: 5000.0,
            bearing_start_deg: 0.0,
            bearing_extent_deg: 360.0,
        },
        detection_probability: 0.9,
        clutter_rate: 5.0,
        birth_rate: 0.05,
    }
}

fn scan(sensor: usize, time: f64, tag: u64, pts: &[(f64, f64)]) -> Scan {
    Scan {
        sensor,
        time,
        tag,
        detections: pts
            .iter()
            .map(|&(x, y)| Measurement::Cartesian { x, y })
            .collect(),
    }
}

#[test]
fn late_scans_are_refused_with_a_reason() {
    let mut t = Tracker::new(TrackerConfig::default(), vec![camera()]).unwrap();
    t.submit(scan(0, 10.0, 1, &[])).unwrap();
    let e = t.submit(scan(0, 9.5, 2, &[])).unwrap_err();
    assert_eq!(e.kind(), ErrorKind::LateScan);
    assert!(
        e.to_string()
            .contains("0.500 s older than the picture time 10"),
        "{e}"
    );
    assert_eq!(
        t.submit(scan(3, 11.0, 3, &[])).unwrap_err().kind(),
        ErrorKind::UnknownSensor
    );
    let bad = Scan {
        sensor: 0,
        time: 12.0,
        tag: 4,
        detections: vec![Measurement::Polar {
            range: 1.0,
            bearing_deg: 0.0,
            range_rate: None,
        }],
    };
    assert!(
        t.submit(bad)
            .unwrap_err()
            .to_string()
            .contains("detections[0] is polar but sensor quay-camera is cartesian")
    );
    let nan = scan(0, 12.0, 5, &[(f64::NAN, 0.0)]);
    assert_eq!(t.submit(nan).unwrap_err().kind(), ErrorKind::InvalidInput);
}

#[test]
fn reorder_window_applies_buffered_scans_in_time_order() {
    let cfg = TrackerConfig {
        reorder_window: 1.0,
        ..TrackerConfig::default()
    };
    let mut t = Tracker::new(cfg, vec![camera(), radar()]).unwrap();
    assert!(t.submit(scan(0, 10.0, 1, &[])).unwrap().is_empty());
    // Older than the newest, but inside the window: buffered, not refused.
    assert!(t.submit(scan(0, 9.6, 2, &[])).unwrap().is_empty());
    assert_eq!(t.pending(), 2);
    let out = t.submit(scan(0, 11.2, 3, &[])).unwrap();
    let tags: Vec<u64> = out.iter().map(|p| p.tag).collect();
    assert_eq!(
        tags,
        vec![2, 1],
        "released in time order up to newest − window"
    );
    // Now the picture is at 10.0: a scan at 9.9 is refused.
    assert_eq!(
        t.submit(scan(0, 9.9, 4, &[])).unwrap_err().kind(),
        ErrorKind::LateScan
    );
    let rest = t.flush();
    assert_eq!(rest.iter().map(|p| p.tag).collect::<Vec<_>>(), vec![3]);
    assert_eq!(t.pending(), 0);
}

#[test]
fn ids_are_never_reused_and_ended_tracks_are_reported() {
    let mut t = Tracker::new(TrackerConfig::default(), vec![camera()]).unwrap();
    let mut seen = std::collections::BTreeSet::new();
    let mut ended_all = std::collections::BTreeSet::new();
    for k in 0..40u64 {
        // a target for 15 scans, then nothing
        let pts: Vec<(f64, f64)> = if k < 15 {
            vec![(100.0 + 5.0 * k as f64, 50.0)]
        } else {
            vec![]
        };
        for p in t.submit(scan(0, k as f64, k, &pts)).unwrap() {
            for tr in &p.tracks {
                assert!(!ended_all.contains(&tr.id), "ended id {} came back", tr.id);
                seen.insert(tr.id);
            }
            ended_all.extend(p.ended.iter().copied());
        }
    }
    assert!(!seen.is_empty());
    assert_eq!(
        seen, ended_all,
        "every reported track ended once the target left"
    );
}

/// The camera with `clutter` false detections per scan over its 4 km × 4 km field of view.
fn camera_with_clutter(clutter: f64) -> SensorConfig {
    SensorConfig {
        clutter_rate: clutter,
        ..camera()
    }
}

/// Existence odds factor of one detection exactly at the predicted position of a candidate
/// born one second earlier from one detection, by the integrated PDA update (Mušicki, Evans &
/// Stanković 1994: odds × (1 − P_D P_G + P_D Σ g_j / ρ)) and the survival prediction, with
/// S = 2σ² + σ_v² Δt² + q̃ Δt³/3 per axis (the CWNA covariance, Bar-Shalom, Li & Kirubarajan
/// 2001, §6.2.2, of a state whose position variance is σ² and velocity variance σ_v²).
fn second_detection_odds_factor(cfg: &TrackerConfig, sensor: &SensorConfig) -> f64 {
    let SensorKind::Cartesian { sigma } = sensor.kind else {
        unreachable!("a cartesian test sensor")
    };
    let dt = 1.0;
    let s = 2.0 * sigma * sigma
        + cfg.initial_velocity_std.powi(2) * dt * dt
        + cfg.process_noise * dt.powi(3) / 3.0;
    let g = 1.0 / (2.0 * std::f64::consts::PI * s);
    let rho = sensor.clutter_rate / (4000.0 * 4000.0);
    let pd = sensor.detection_probability;
    let r0 = sensor.birth_rate / (sensor.birth_rate + sensor.clutter_rate);
    let r_pred = r0 * cfg.survival_probability.powf(dt);
    let odds = |r: f64| r / (1.0 - r);
    odds(r_pred) * (1.0 - pd * cfg.gate_probability + pd * g / rho) / odds(r0)
}

// A candidate is reported when its existence odds reach 10² times its odds at birth, Wald's
// upper threshold for α = β = 1 %: with a sparse sensor its second detection does it, in dense
// clutter (the same object, the same detections, 200 false detections a scan configured) the
// second is not enough (the IPDA factor says by how much) and the third does it.
#[test]
fn candidates_are_reported_at_the_sequential_test_threshold() {
    let cfg = TrackerConfig::default();
    for (clutter, reported_from) in [(1.0, 2u64), (200.0, 3)] {
        let sensor = camera_with_clutter(clutter);
        let factor = second_detection_odds_factor(&cfg, &sensor);
        assert_eq!(
            factor > TENTATIVE_ODDS_RISE,
            reported_from == 2,
            "clutter {clutter}: the second detection multiplies the odds by {factor}"
        );
        let mut t = Tracker::new(cfg.clone(), vec![sensor]).unwrap();
        for k in 1..=4u64 {
            let p = t.submit(scan(0, k as f64, k, &[(120.0, -40.0)])).unwrap();
            let n = p.iter().map(|p| p.tracks.len()).sum::<usize>();
            let expected = usize::from(k >= reported_from);
            assert_eq!(n, expected, "clutter {clutter}: tracks after scan {k}");
        }
    }
}

// Two candidates that most likely hold the same detection are two versions of one object: the
// more probable one stays, whatever their order inside the tracker. Here the candidate born
// 30 m away comes first and explains the stationary object's second detection worse.
#[test]
fn of_rival_candidates_the_more_probable_stays() {
    let mut t = Tracker::new(TrackerConfig::default(), vec![camera_with_clutter(200.0)]).unwrap();
    t.submit(scan(0, 1.0, 1, &[(30.0, 0.0), (0.0, 0.0)]))
        .unwrap();
    let p = t.submit(scan(0, 2.0, 2, &[(0.0, 0.0)])).unwrap();
    assert_eq!(p[0].stats.candidates, 1, "the rival was dropped");
    let p = t.submit(scan(0, 3.0, 3, &[(0.0, 0.0)])).unwrap();
    let tracks = &p[0].tracks;
    assert_eq!(tracks.len(), 1);
    // The near candidate saw a stationary object; the far one would have moved at about
    // −29 m/s to reach the detection.
    assert!(
        tracks[0].state[2].abs() < 5.0,
        "the reported track is the near candidate: vx = {}",
        tracks[0].state[2]
    );
}

#[test]
fn runtime_parameter_change_is_validated_and_applied() {
    let mut t = Tracker::new(TrackerConfig::default(), vec![camera(), radar()]).unwrap();
    t.update_sensor(
        1,
        &SensorParams {
            detection_probability: Some(0.7),
            clutter_rate: Some(12.0),
            ..SensorParams::default()
        },
    )
    .unwrap();
    assert_eq!(t.sensor_health(1).configured_detection_probability, 0.7);
    assert_eq!(t.sensors()[1].clutter_rate, 12.0);
    let e = t
        .update_sensor(
            1,
            &SensorParams {
                detection_probability: Some(1.5),
                ..SensorParams::default()
            },
        )
        .unwrap_err();
    assert_eq!(
        e.to_string(),
        "sensor spit-radar: detection probability must be in (0, 1], got 1.5"
    );
    assert!(
        t.update_sensor(
            0,
            &SensorParams {
                sigma_range: Some(3.0),
                ..SensorParams::default()
            }
        )
        .is_err()
    );
    assert_eq!(
        t.sensors()[1].detection_probability,
        0.7,
        "a refused change leaves the sensor as it was"
    );
}

#[test]
fn m_of_n_confirms_after_m_detections() {
    let cfg = TrackerConfig {
        management: Management::MOfN {
            m: 3,
            n: 4,
            max_misses: 3,
        },
        ..TrackerConfig::default()
    };
    let mut t = Tracker::new(cfg, vec![camera()]).unwrap();
    let mut first_confirmed = None;
    for k in 0..8u64 {
        let p = t
            .submit(scan(0, k as f64, k, &[(10.0 * k as f64, 0.0)]))
            .unwrap()
            .pop()
            .unwrap();
        if first_confirmed.is_none()
            && p.tracks
                .iter()
                .any(|tr| tr.status == TrackStatus::Confirmed)
        {
            first_confirmed = Some(k);
        }
    }
    // Detections in scans 0, 1, 2: three hits after the third scan.
    assert_eq!(first_confirmed, Some(2));
    assert!(
        TrackerConfig {
            management: Management::MOfN {
                m: 5,
                n: 4,
                max_misses: 1
            },
            ..TrackerConfig::default()
        }
        .validate()
        .is_err()
    );
}

#[test]
fn configuration_errors_name_the_field() {
    let mut c = camera();
    c.fov = FieldOfView::Sector {
        min_range: 0.0,
        max_range: 10.0,
        bearing_start_deg: 0.0,
        bearing_extent_deg: 90.0,
    };
    assert_eq!(
        c.validate().unwrap_err().to_string(),
        "sensor quay-camera: a cartesian sensor needs a rectangular field of view"
    );
    let cfg = TrackerConfig {
        management: Management::Existence {
            confirm: 0.5,
            delete: 0.6,
        },
        ..TrackerConfig::default()
    };
    assert!(
        cfg.validate()
            .unwrap_err()
            .to_string()
            .contains("delete threshold must be below the confirm threshold")
    );
    assert!(
        Tracker::new(TrackerConfig::default(), vec![camera(), camera()])
            .unwrap_err()
            .to_string()
            .contains("configured twice")
    );
}

fn is_psd(c: &[[f64; 4]; 4]) -> bool {
    let m = Matrix4::from_fn(|i, j| c[i][j]);
    let scale = m.abs().max().max(1e-300);
    (0..4).all(|i| (0..4).all(|j| (m[(i, j)] - m[(j, i)]).abs() <= 1e-9 * scale))
        && (m + Matrix4::identity() * (1e-9 * scale))
            .cholesky()
            .is_some()
}

proptest! {
    #![proptest_config(ProptestConfig { cases: 48, ..ProptestConfig::default() })]
    // Arbitrary sequences of valid scans (any mix of sensors, irregular steps, extreme but
    // finite positions) never panic, never produce NaN, keep covariances symmetric PSD and
    // existence in [0, 1].
    #[test]
    fn arbitrary_scans_keep_the_picture_sane(
        steps in proptest::collection::vec(
            (0usize..2, 0.0..5.0f64, proptest::collection::vec((-3000.0..3000.0f64, -3000.0..3000.0f64), 0..12)),
            1..40),
        gnn in any::<bool>())
    {
        let cfg = TrackerConfig {
            association: if gnn { AssociationMethod::Gnn } else { AssociationMethod::Jpda { max_exact_hypotheses: 50, k_best: 10 } },
            ..TrackerConfig::default()
        };
        let mut t = Tracker::new(cfg, vec![camera(), radar()]).unwrap();
        let mut time = 0.0;
        for (k, (sensor, dt, pts)) in steps.iter().enumerate() {
            time += dt;
            let detections = match sensor {
                0 => pts.iter().map(|&(x, y)| Measurement::Cartesian { x, y }).collect(),
                _ => pts.iter().map(|&(x, y)| {
                    let (dx, dy) = (x, y + 500.0);
                    Measurement::Polar { range: dx.hypot(dy), bearing_deg: dx.atan2(dy).to_degrees().rem_euclid(360.0), range_rate: None }
                }).collect(),
            };
            let pics = t.submit(Scan { sensor: *sensor, time, tag: k as u64, detections }).unwrap();
            for p in pics {
                for tr in &p.tracks {
                    prop_assert!(tr.state.iter().all(|v| v.is_finite()));
                    prop_assert!((0.0..=1.0).contains(&tr.existence));
                    prop_assert!(is_psd(&tr.covariance), "covariance not PSD: {:?}", tr.covariance);
                }
                prop_assert!(p.tracks.windows(2).all(|w| w[0].id < w[1].id));
            }
        }
    }
}

/// Scans of two sensors (cartesian every 1 s, polar every 2 s) over five crossing vessels in
/// clutter, from the seeded simulator.
fn two_sensor_scans(n: usize) -> Vec<Scan> {
    use crate::sim::{Leg, Scenario, SimSensor, SimTarget, Simulator};
    let targets = (0..5)
        .map(|k| SimTarget {
            name: format!("v{k}"),
            birth: 2.0 * k as f64,
            death: 1e9,
            initial: [-800.0 + 300.0 * k as f64, -600.0, 4.0, 3.0 + k as f64],
            legs: vec![Leg::Turn {
                duration: 1e9,
                rate_deg_s: 0.5 - 0.25 * k as f64,
            }],
        })
        .collect();
    let sc = Scenario {
        sensors: vec![
            SimSensor {
                config: camera(),
                period: 1.0,
                offset: 0.0,
            },
            SimSensor {
                config: radar(),
                period: 2.0,
                offset: 0.5,
            },
        ],
        targets,
        start: 1000.0,
        duration: None,
        seed: 7,
    };
    Simulator::new(&sc)
        .unwrap()
        .take(n)
        .map(|s| s.scan)
        .collect()
}

/// Exact text of a picture list: Debug prints every f64 as its shortest round-trip form, so
/// equal text means equal bits.
fn exact(p: &[Picture]) -> String {
    format!("{p:?}")
}

#[test]
fn restored_snapshot_continues_bit_for_bit() {
    let scans = two_sensor_scans(90);
    let config = TrackerConfig {
        reorder_window: 1.5,
        ..TrackerConfig::default()
    };
    let sensors = vec![camera(), radar()];
    // Delivered slightly out of order, so that the reorder buffer holds scans at the cut.
    let mut order: Vec<Scan> = scans.clone();
    for pair in order.chunks_mut(3) {
        pair.reverse();
    }
    let mut whole = Tracker::new(config.clone(), sensors.clone()).unwrap();
    let mut first = Tracker::new(config.clone(), sensors).unwrap();
    let change = SensorParams {
        clutter_rate: Some(7.5),
        ..SensorParams::default()
    };
    let cut = 50;
    let mut expected = Vec::new();
    let mut got = Vec::new();
    for (k, s) in order.iter().enumerate() {
        if k == 20 {
            whole.update_sensor(1, &change).unwrap();
            first.update_sensor(1, &change).unwrap();
        }
        let out = whole.submit(s.clone()).unwrap();
        if k >= cut {
            expected.extend(out);
        } else {
            first.submit(s.clone()).unwrap();
        }
    }
    expected.extend(whole.flush());
    let snap = first.snapshot();
    assert!(
        !snap.buffered.is_empty(),
        "the cut should fall with scans buffered"
    );
    assert!(
        snap.tracks
            .iter()
            .any(|t| t.status == TrackStatus::Confirmed)
    );
    assert_eq!(snap.sensors[1].clutter_rate, 7.5);
    let mut restored = Tracker::restore(config, snap.clone()).unwrap();
    assert_eq!(
        restored.snapshot(),
        snap,
        "restore then snapshot is the identity"
    );
    for s in &order[cut..] {
        got.extend(restored.submit(s.clone()).unwrap());
    }
    got.extend(restored.flush());
    assert_eq!(got.len(), expected.len());
    assert_eq!(exact(&got), exact(&expected));
    assert_eq!(
        format!("{:?}", restored.sensor_health(1)),
        format!("{:?}", whole.sensor_health(1))
    );
}

#[test]
fn restore_refuses_inconsistent_snapshots_naming_the_part() {
    let mut t = Tracker::new(TrackerConfig::default(), vec![camera(), radar()]).unwrap();
    for s in two_sensor_scans(30) {
        t.submit(s).unwrap();
    }
    let good = t.snapshot();
    assert!(good.tracks.len() >= 2);
    let refuse = |edit: &dyn Fn(&mut TrackerSnapshot), needle: &str| {
        let mut s = good.clone();
        edit(&mut s);
        let e = Tracker::restore(TrackerConfig::default(), s).unwrap_err();
        assert!(
            e.to_string().contains(needle),
            "{e} should mention {needle}"
        );
    };
    refuse(&|s| s.version = 99, "version 99");
    refuse(&|s| s.tracks[0].mean[1] = f64::NAN, "tracks[0]");
    refuse(&|s| s.tracks[1].cov[0][0] = -5.0, "tracks[1]");
    refuse(&|s| s.tracks[0].existence = 1.5, "existence");
    refuse(&|s| s.tracks.swap(0, 1), "ascend");
    refuse(&|s| s.next_id = 1, "next_id");
    refuse(&|s| s.tracks[0].sensors = [1 << 5, 0], "sensor index");
    refuse(&|s| s.health.pop().map_or((), |_| ()), "health windows");
    refuse(&|s| s.sensors[0].detection_probability = 2.0, "sensors");
    Tracker::restore(TrackerConfig::default(), good).unwrap();
}

// A dense-clutter camera scene (200 false detections a scan over 4 km × 4 km, two movers):
// after a few scans most tracks are candidates, and those born in one scan that have gated
// nothing since share their covariance.
fn dense_clutter_tracker(scans: u64) -> Tracker {
    use rand::{Rng, SeedableRng};
    let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(7);
    let mut t = Tracker::new(TrackerConfig::default(), vec![camera_with_clutter(200.0)]).unwrap();
    for k in 0..scans {
        let time = k as f64;
        let mut pts = vec![(-800.0 + 6.0 * time, 100.0), (300.0, 900.0 - 4.0 * time)];
        pts.extend((0..200).map(|_| {
            (
                rng.random_range(-2000.0..2000.0),
                rng.random_range(-2000.0..2000.0),
            )
        }));
        t.submit(scan(0, time, k, &pts)).unwrap();
    }
    t
}

// The shortcut of step 1 (a track whose covariance holds the same bits as the last one
// prepared in full takes that record, with ẑ and P_D of its own) must give exactly what
// `Gaussian::prepare` gives for every track; the scene must also exercise it.
#[test]
fn shared_gate_records_equal_full_preparation_bit_for_bit() {
    let mut t = dense_clutter_tracker(6);
    // Predict to the next scan time, as `apply` does before gating.
    for tr in &mut t.tracks {
        tr.state = t.motion.predict(&tr.state, 1.0).unwrap();
    }
    let rt = &t.runtime[0];
    let Model::Cartesian(model) = rt.model else {
        panic!("the camera is cartesian")
    };
    let gamma = rt.gate.threshold();
    let (mut shared, mut full) = (Vec::new(), Vec::new());
    let (mut hw_shared, mut hw_full) = (Vec::new(), Vec::new());
    gate_records::<2, _>(
        &t.tracks,
        rt,
        &model,
        gamma,
        true,
        &mut shared,
        &mut hw_shared,
    );
    gate_records::<2, _>(&t.tracks, rt, &model, gamma, false, &mut full, &mut hw_full);
    let bits = |r: &Option<GateRecord<2>>| {
        r.map(|r| {
            let mut v: Vec<u64> = r
                .zhat
                .iter()
                .chain(r.s_inv.iter())
                .map(|x| x.to_bits())
                .collect();
            v.extend([r.det_s.0, r.det_s.1, r.pd, r.hw].map(f64::to_bits));
            v
        })
    };
    assert_eq!(shared.len(), t.tracks.len());
    for (k, (a, b)) in shared.iter().zip(&full).enumerate() {
        assert_eq!(bits(a), bits(b), "track {k}");
    }
    let hw_bits = |v: &[f64]| v.iter().map(|x| x.to_bits()).collect::<Vec<_>>();
    assert_eq!(hw_bits(&hw_shared), hw_bits(&hw_full));
    // The shortcut applies to most of them: count neighbours with the same covariance bits.
    let same = t
        .tracks
        .windows(2)
        .filter(|w| same_bits(w[0].state.cov(), w[1].state.cov()))
        .count();
    assert!(
        same * 2 > t.tracks.len(),
        "{same} of {} tracks share their neighbour's covariance",
        t.tracks.len()
    );
}

#[test]
fn same_bits_tells_signed_zeros_apart_and_is_finite_finds_any_bad_entry() {
    let a = nalgebra::Matrix2::new(1.0, 0.0, 0.0, 1.0);
    let mut b = a;
    assert!(same_bits(&a, &b));
    b[(0, 1)] = -0.0;
    assert!(
        !same_bits(&a, &b),
        "0.0 and -0.0 compare equal but are not the same bits"
    );
    let g = Gaussian::new(Vector4::new(1.0, 2.0, 3.0, 4.0), Matrix4::identity()).unwrap();
    assert!(g.is_finite());
    for k in 0..20 {
        for bad in [f64::NAN, f64::INFINITY, f64::NEG_INFINITY] {
            let (mut mean, mut cov) = (*g.mean(), *g.cov());
            if k < 4 {
                mean[k] = bad;
            } else {
                cov[k - 4] = bad;
            }
            let h = Gaussian::from_parts(mean, cov);
            assert!(!h.is_finite(), "entry {k} = {bad}");
        }
    }
}
