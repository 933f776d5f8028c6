//! Frame serialisation, the service's throughput bottleneck: the hand-written writer
//! (`wire::write_frame` into a reused `String`) against serde_json on the same frame.
//!
//! Measured here (2-core dev machine, release): both ≈ 0.6 µs per track, dominated by
//! shortest-round-trip float formatting (18 numbers per track); the hand-written writer saves
//! the intermediate allocations, not time. Rounding the numbers is the lever if needed.

// `criterion_group!` generates an undocumented public function.
#![allow(missing_docs)]

use criterion::{Criterion, criterion_group, criterion_main};
use filter_core::tracker::{Picture, ScanStats, TrackStatus, TrackView};
use plotweave::wire::{AllTracks, FrameWire, write_frame};

fn picture(tracks: usize) -> Picture {
    let tracks = (0..tracks)
        .map(|i| {
            let f = i as f64;
            let mut cov = [[0.0; 4]; 4];
            for (r, row) in cov.iter_mut().enumerate() {
                for (c, v) in row.iter_mut().enumerate() {
                    *v = if r == c {
                        10.0 + f * 0.37
                    } else {
                        0.123 * f / (1.0 + (r + c) as f64)
                    };
                }
            }
            TrackView {
                id: 1000 + i as u64,
                status: if i % 3 == 0 {
                    TrackStatus::Tentative
                } else {
                    TrackStatus::Confirmed
                },
                state: [
                    1234.567 + f * 17.3,
                    -456.789 + f * 3.1,
                    3.21 - f * 0.01,
                    -1.234 + f * 0.02,
                ],
                covariance: cov,
                existence: 0.987_654_321,
                last_update: 1_764_600_000.25 + f * 0.001,
                sensors: [0, 1].into_iter().collect(),
            }
        })
        .collect();
    Picture {
        time: 1_764_600_000.25,
        sensor: 0,
        tag: 4711,
        tracks,
        ended: vec![7, 9],
        stats: ScanStats::default(),
    }
}

fn bench(c: &mut Criterion) {
    let ids = vec!["kestrel-radar".to_string(), "north-mole-camera".to_string()];
    for n in [10, 200] {
        let p = picture(n);
        let mut buf = String::new();
        c.bench_function(&format!("write_frame/{n} tracks"), |b| {
            b.iter(|| {
                write_frame(&mut buf, std::hint::black_box(&p), &ids, &AllTracks);
                buf.len()
            })
        });
        c.bench_function(&format!("serde_json frame/{n} tracks"), |b| {
            b.iter(|| {
                serde_json::to_string(&FrameWire::from_picture(std::hint::black_box(&p), &ids))
                    .map(|s| s.len())
            })
        });
    }
}

criterion_group!(benches, bench);
criterion_main!(benches);
