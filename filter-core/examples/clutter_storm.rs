//! Profiling aid: per-scan tracker time under the load generator's pattern (a cartesian sensor
//! over 10 km × 10 km, 20 movers and 980 uniform clutter detections per scan, scans 2 ms apart).
//! `cargo run --release -p filter-core --example clutter_storm -- 3000`
#![allow(missing_docs)]
use filter_core::tracker::*;
use rand::{Rng, SeedableRng};

fn main() {
    let scans: usize = std::env::args()
        .nth(1)
        .and_then(|a| a.parse().ok())
        .unwrap_or(3000);
    let dt: f64 = std::env::args()
        .nth(2)
        .and_then(|a| a.parse().ok())
        .unwrap_or(0.002);
    let cfg = SensorConfig {
        id: "load-0".into(),
        kind: SensorKind::Cartesian { sigma: 5.0 },
        fov: FieldOfView::Rect {
            x_min: 0.0,
            x_max: 10_000.0,
            y_min: 0.0,
            y_max: 10_000.0,
        },
        detection_probability: 0.9,
        clutter_rate: 980.0,
        birth_rate: 0.05,
    };
    let mut t = Tracker::new(TrackerConfig::default(), vec![cfg]).unwrap();
    let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(1);
    let mut times = Vec::new();
    let mut worst = (0.0, 0, 0, 0);
    // (confirmed, tentative, pictures) over the scans after the first 100.
    let mut reported = (0usize, 0usize, 0usize);
    for k in 0..scans {
        let time = k as f64 * dt;
        let mut d: Vec<Measurement> = (0..20)
            .map(|i| Measurement::Cartesian {
                x: 500.0 + (7.0 * time) % 9000.0,
                y: 250.0 + 450.0 * i as f64,
            })
            .collect();
        d.extend((0..980).map(|_| Measurement::Cartesian {
            x: rng.random_range(0.0..10_000.0),
            y: rng.random_range(0.0..10_000.0),
        }));
        let s = std::time::Instant::now();
        let p = t
            .submit(Scan {
                sensor: 0,
                time,
                tag: k as u64,
                detections: d,
            })
            .unwrap()
            .pop()
            .unwrap();
        let e = s.elapsed().as_secs_f64() * 1e3;
        times.push(e);
        if k >= 100 {
            for tr in &p.tracks {
                match tr.status {
                    TrackStatus::Confirmed => reported.0 += 1,
                    TrackStatus::Tentative => reported.1 += 1,
                }
            }
            reported.2 += 1;
        }
        if e > worst.0 {
            worst = (e, k, p.stats.candidates, p.stats.max_cluster_tracks);
        }
    }
    times.sort_by(f64::total_cmp);
    let n = times.len();
    println!(
        "per scan: p50 {:.3} ms, p99 {:.3} ms, max {:.3} ms (scan {}, {} candidates, largest cluster {})",
        times[n / 2],
        times[n * 99 / 100],
        worst.0,
        worst.1,
        worst.2,
        worst.3
    );
    let pictures = reported.2.max(1) as f64;
    println!(
        "reported per picture: {:.1} confirmed, {:.1} tentative",
        reported.0 as f64 / pictures,
        reported.1 as f64 / pictures
    );
}
