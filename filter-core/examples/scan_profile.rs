//! Profiling aid: runs tracker scans of the benchmark scene at a given size.
//! `cargo run --release -p filter-core --example scan_profile -- 4000 50`
#![allow(missing_docs)]
use filter_core::sim::{Scenario, SimSensor, SimTarget, Simulator};
use filter_core::tracker::*;

fn main() {
    let mut args = std::env::args().skip(1);
    let n: usize = args.next().and_then(|a| a.parse().ok()).unwrap_or(400);
    let scans: usize = args.next().and_then(|a| a.parse().ok()).unwrap_or(50);
    let side = 500.0 * (n as f64).sqrt();
    let per_row = (n as f64).sqrt().ceil() as usize;
    let targets = (0..n)
        .map(|k| SimTarget {
            name: format!("t{k}"),
            birth: 0.0,
            death: 1e12,
            initial: [
                250.0 + 500.0 * (k % per_row) as f64,
                250.0 + 500.0 * (k / per_row) as f64,
                3.0 * ((k % 7) as f64 - 3.0),
                2.0 * ((k % 5) as f64 - 2.0),
            ],
            legs: vec![],
        })
        .collect();
    let sensor = SimSensor {
        config: SensorConfig {
            id: "bench".into(),
            kind: SensorKind::Cartesian { sigma: 10.0 },
            fov: FieldOfView::Rect {
                x_min: -1000.0,
                x_max: side + 1000.0,
                y_min: -1000.0,
                y_max: side + 1000.0,
            },
            detection_probability: 0.9,
            clutter_rate: n as f64,
            birth_rate: 0.1,
        },
        period: 1.0,
        offset: 0.0,
    };
    let sc = Scenario {
        sensors: vec![sensor],
        targets,
        start: 0.0,
        duration: None,
        seed: 42,
    };
    let cfg = TrackerConfig {
        initial_velocity_std: 10.0,
        ..TrackerConfig::default()
    };
    let mut tracker = Tracker::new(cfg, vec![sc.sensors[0].config.clone()]).unwrap();
    let mut sim = Simulator::new(&sc).unwrap();
    let mut total = std::time::Duration::ZERO;
    let mut last = None;
    for k in 0..scans {
        let s = sim.next().unwrap().scan;
        let t = std::time::Instant::now();
        let p = tracker.submit(s).unwrap();
        if k >= 30 {
            total += t.elapsed();
        }
        last = p.into_iter().last();
    }
    let p = last.unwrap();
    println!(
        "n={n}: {:.3} ms/scan over {} scans; tracks {} (confirmed {}), clusters {}, max cluster {}, hypotheses {}, truncated {}",
        total.as_secs_f64() * 1e3 / (scans.saturating_sub(30)) as f64,
        scans - 30,
        p.tracks.len(),
        p.tracks
            .iter()
            .filter(|t| t.status == TrackStatus::Confirmed)
            .count(),
        p.stats.clusters,
        p.stats.max_cluster_tracks,
        p.stats.hypotheses,
        p.stats.truncated_clusters
    );
}
