//! The benchmark scene shared by the `core` benchmark and the `scan_profile` example.

use filter_core::sim::{Leg, Scenario, SimSensor, SimTarget};
use filter_core::tracker::{FieldOfView, SensorConfig, SensorKind};

/// N targets on a grid 500 m apart inside a square of side 500 √N m, one cartesian sensor
/// (σ = 10 m, P_D = 0.9, 1 s scans) with N clutter detections per scan over the square:
/// constant density, so 10× the targets is 10× the area. Each target circles its grid cell
/// (5 m/s on a 100 m radius, alternately left and right) so that the scene stays the same
/// however many scans a benchmark runs.
pub(crate) fn scene(n: usize) -> Scenario {
    let side = 500.0 * (n as f64).sqrt();
    let per_row = (n as f64).sqrt().ceil() as usize;
    let targets = (0..n)
        .map(|k| {
            let (i, j) = (k % per_row, k / per_row);
            SimTarget {
                name: format!("t{k}"),
                birth: 0.0,
                death: 1e12,
                initial: {
                    let heading = (k as f64) * 0.7;
                    [
                        250.0 + 500.0 * i as f64,
                        250.0 + 500.0 * j as f64,
                        5.0 * heading.sin(),
                        5.0 * heading.cos(),
                    ]
                },
                // ω = v / r = 5 / 100 rad/s
                legs: vec![Leg::Turn {
                    duration: 1e12,
                    rate_deg_s: if k % 2 == 0 { 1.0 } else { -1.0 } * 0.05f64.to_degrees(),
                }],
            }
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
    Scenario {
        sensors: vec![sensor],
        targets,
        start: 0.0,
        duration: None,
        seed: 42,
    }
}
