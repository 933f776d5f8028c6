//! Batch decoding on the ingest path: `wire::decode_batch` on a 1000-detection cartesian batch
//! (the load generator's shape, about 30 KB), against the same typed reading through
//! `serde_path_to_error` (which the decoder now uses only to name the field of a refused
//! message).

// `criterion_group!` generates an undocumented public function.
#![allow(missing_docs)]

use criterion::{Criterion, criterion_group, criterion_main};
use filter_core::tracker::{FieldOfView, SensorConfig, SensorKind};
use plotweave::wire::{BatchWire, DecodeLimits, decode_batch};

fn batch(n: usize) -> String {
    let mut s =
        String::from(r#"{"sensor":"weir-radar","seq":4711,"time":1764600000.25,"detections":["#);
    // A fixed linear congruential sequence: positions over 10 km with two decimals.
    let mut state: u64 = 12345;
    let mut next = || {
        state = state
            .wrapping_mul(6_364_136_223_846_793_005)
            .wrapping_add(1_442_695_040_888_963_407);
        (state >> 11) as f64 / (1u64 << 53) as f64 * 10_000.0
    };
    for i in 0..n {
        if i > 0 {
            s.push(',');
        }
        s.push_str(&format!(r#"{{"x":{:.2},"y":{:.2}}}"#, next(), next()));
    }
    s.push_str("]}");
    s
}

fn bench(c: &mut Criterion) {
    let sensors = vec![SensorConfig {
        id: "weir-radar".into(),
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
    }];
    let limits = DecodeLimits {
        max_detections: 10_000,
    };
    let text = batch(1000);
    c.bench_function("decode_batch/1000 detections", |b| {
        b.iter(|| {
            decode_batch(std::hint::black_box(&text), &sensors, limits).map(|s| s.detections.len())
        })
    });
    c.bench_function("path-tracking reading/1000 detections", |b| {
        b.iter(|| {
            let mut de = serde_json::Deserializer::from_str(std::hint::black_box(&text));
            serde_path_to_error::deserialize::<_, BatchWire>(&mut de).map(|b| b.detections.len())
        })
    });
}

criterion_group!(benches, bench);
criterion_main!(benches);
