//! Profiling aid: a tight constant-velocity predict + cartesian update loop.
#![allow(missing_docs)]
use filter_core::gaussian::Gaussian;
use filter_core::measurement::{CartesianPosition, MeasurementModel};
use filter_core::motion::{ConstantVelocity, MotionModel};
use nalgebra::{Matrix4, Vector2, Vector4};
fn main() {
    let cv = ConstantVelocity::continuous(0.5).unwrap();
    let cart = CartesianPosition::new(10.0).unwrap();
    let mut g = Gaussian::new(
        Vector4::new(100.0, 200.0, 5.0, -3.0),
        Matrix4::from_diagonal(&Vector4::new(50.0, 50.0, 4.0, 4.0)),
    )
    .unwrap();
    let t = std::time::Instant::now();
    let n = 20_000_000;
    for i in 0..n {
        let p = cv.predict(&g, 1.0).unwrap();
        let prep = p.prepare::<2, _>(&cart).unwrap();
        let z = Vector2::new(100.0 + 5.0 * i as f64, 200.0 - 3.0 * i as f64);
        let nu = <CartesianPosition as MeasurementModel<4, 2>>::residual(&cart, &z, &prep.zhat);
        g = prep.apply(&p, &nu);
    }
    println!(
        "{:.1} ns per predict+update ({})",
        t.elapsed().as_secs_f64() * 1e9 / n as f64,
        g.mean()[0]
    );
}
