//! Profiling aid: runs tracker scans of the benchmark scene at a given size.
//! `cargo run --release -p filter-core --example scan_profile -- 4000 50`
#![allow(missing_docs)]
use filter_core::sim::Simulator;

#[path = "../benches/scene.rs"]
mod scene;
use filter_core::tracker::*;
use scene::scene;

fn main() {
    let mut args = std::env::args().skip(1);
    let n: usize = args.next().and_then(|a| a.parse().ok()).unwrap_or(400);
    let scans: usize = args.next().and_then(|a| a.parse().ok()).unwrap_or(50);
    let sc = scene(n);
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
    let t0 = std::time::Instant::now();
    for _ in 0..20 {
        std::hint::black_box(tracker.picture());
    }
    println!(
        "picture() alone: {:.3} ms",
        t0.elapsed().as_secs_f64() * 1e3 / 20.0
    );
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
