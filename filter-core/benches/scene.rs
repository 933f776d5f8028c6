//! The benchmark scene shared by the `core` benchmark and the `scan_profile` example.

use filter_core::sim::{Scenario, SimSensor, SimTarget};
use filter_core::tracker::{FieldOfView, SensorConfig, SensorKind};

/// N targets on a grid 500 m apart inside a square of side 500 √N m, one cartesian sensor
/// (σ = 10 m, P_D = 0.9, 1 s scans) with N clutter detections per scan over the square:
/// constant density, so 10× the targets is 10× the area.
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
                initial: [
                    250.0 + 500.0 * i as f64,
                    250.0 + 500.0 * j as f64,
                    3.0 * ((k % 7) as f64 - 3.0),
                    2.0 * ((k % 5) as f64 - 2.0),
                ],
                legs: vec![],
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
