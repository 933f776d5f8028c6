//! Criterion benchmarks of the estimation core: Kalman predict/update, gating, one PDA update,
//! and whole tracker scans at two scales (cost growth measured, not assumed).
//!
//! Run: `cargo bench -p filter-core --bench core` (figures in docs/performance.md).
#![allow(missing_docs)]

use std::hint::black_box;
use std::time::{Duration, Instant};

use criterion::{Criterion, criterion_group, criterion_main};
use filter_core::clutter::association_weights;
use filter_core::gating::Gate;
use filter_core::gaussian::Gaussian;
use filter_core::measurement::{CartesianPosition, MeasurementModel, RangeBearing};
use filter_core::motion::{ConstantVelocity, MotionModel};
use filter_core::sim::Simulator;
use filter_core::single::pda_combine;
use filter_core::tracker::*;
use nalgebra::{Matrix4, Vector2, Vector4};

fn state() -> Gaussian<4> {
    Gaussian::new(
        Vector4::new(100.0, 200.0, 5.0, -3.0),
        Matrix4::from_diagonal(&Vector4::new(50.0, 50.0, 4.0, 4.0)),
    )
    .unwrap()
}

fn kalman(c: &mut Criterion) {
    let cv = ConstantVelocity::continuous(0.5).unwrap();
    let cart = CartesianPosition::new(10.0).unwrap();
    let polar = RangeBearing::new([0.0, 0.0], 10.0, 0.3).unwrap();
    let z = Vector2::new(105.0, 197.0);
    let g = state();
    c.bench_function("cv_predict", |b| {
        b.iter(|| cv.predict(black_box(&g), black_box(1.0)).unwrap())
    });
    c.bench_function("cv_predict_update_cartesian", |b| {
        b.iter(|| {
            let p = cv.predict(black_box(&g), 1.0).unwrap();
            let prep = p.prepare::<2, _>(&cart).unwrap();
            let nu = <CartesianPosition as MeasurementModel<4, 2>>::residual(
                &cart,
                black_box(&z),
                &prep.zhat,
            );
            prep.apply(&p, &nu)
        })
    });
    let zp = Vector2::new(223.0, 0.46);
    c.bench_function("cv_predict_update_polar_ekf", |b| {
        b.iter(|| {
            let p = cv.predict(black_box(&g), 1.0).unwrap();
            let prep = p.prepare::<2, _>(&polar).unwrap();
            let nu = <RangeBearing as MeasurementModel<4, 2>>::residual(
                &polar,
                black_box(&zp),
                &prep.zhat,
            );
            prep.apply(&p, &nu)
        })
    });
    // Gating: the cached Mahalanobis test of one candidate against a prepared update.
    let prep = g.prepare::<2, _>(&cart).unwrap();
    let gate = Gate::new(0.99, 2).unwrap();
    let cands: Vec<Vector2<f64>> = (0..64)
        .map(|i| Vector2::new(100.0 + (i % 8) as f64 * 3.0, 195.0 + (i / 8) as f64 * 3.0))
        .collect();
    c.bench_function("gate_64_candidates", |b| {
        b.iter(|| {
            let mut n = 0;
            for z in black_box(&cands) {
                let nu = z - prep.zhat;
                n += usize::from(gate.accepts(prep.d2(&nu)));
            }
            n
        })
    });
    // One PDA update with 5 gated detections (weights + combination), prepared update given.
    let nus: Vec<Vector2<f64>> = (0..5)
        .map(|i| Vector2::new(i as f64 - 2.0, 1.5 - i as f64 * 0.7))
        .collect();
    let ln_k = [(-8.0f64); 5];
    c.bench_function("pda_update_5_detections", |b| {
        b.iter(|| {
            let ln_g: Vec<f64> = black_box(&nus)
                .iter()
                .map(|n| prep.ln_likelihood_from_d2(prep.d2(n)))
                .collect();
            let beta = association_weights(&ln_g, &ln_k, 0.9, 0.99);
            pda_combine(&g, &prep, &nus, &beta)
        })
    });
}

#[path = "scene.rs"]
mod scene;
use scene::scene;

fn tracker_scans(c: &mut Criterion) {
    let mut group = c.benchmark_group("tracker_scan");
    group
        .sample_size(20)
        .measurement_time(Duration::from_secs(8));
    for n in [400usize, 4000] {
        let sc = scene(n);
        let mut sim = Simulator::new(&sc).unwrap();
        let cfg = TrackerConfig {
            initial_velocity_std: 10.0,
            ..TrackerConfig::default()
        };
        let mut tracker = Tracker::new(cfg, vec![sc.sensors[0].config.clone()]).unwrap();
        // Warm up until the picture is in steady state (tracks confirmed, clutter tracks cycling).
        for _ in 0..30 {
            tracker.submit(sim.next().unwrap().scan).unwrap();
        }
        group.bench_function(format!("{n}_targets_{n}_clutter"), |b| {
            b.iter_custom(|iters| {
                let mut total = Duration::ZERO;
                for _ in 0..iters {
                    let scan = sim.next().unwrap().scan;
                    let t = Instant::now();
                    black_box(tracker.submit(scan).unwrap());
                    total += t.elapsed();
                }
                total
            })
        });
    }
    group.finish();
}

criterion_group!(benches, kalman, tracker_scans);
criterion_main!(benches);
