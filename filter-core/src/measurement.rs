//! Measurement models: cartesian position, polar range/bearing (optionally range rate) from a
//! sensor at a known site position, converted measurements, and the unscented transform.
//!
//! Conventions: the state's first four entries are x, y (m, east and north) and vx, vy (m/s),
//! whatever the motion model. Bearings are measured clockwise from north; at the edge of the
//! library (configuration, wire) they are in degrees, inside they are radians. A polar
//! measurement vector is (r in m, b in rad) or (r in m, b in rad, ṙ in m/s, positive when opening).
//! Bearing innovations are wrapped to the half-open interval [−π, π).

use std::f64::consts::PI;

use nalgebra::{Matrix2, SMatrix, SVector, Vector2};

use crate::error::{Error, Result, check_non_negative, check_positive};
use crate::gaussian::{Gaussian, PreparedUpdate};

/// A measurement model z = h(x) + w, w ~ N(0, R), over an N-dimensional state with positions at
/// indices 0, 1 and velocities at 2, 3.
pub trait MeasurementModel<const N: usize, const M: usize> {
    /// h(x): the noise-free measurement of state x.
    fn predict(&self, x: &SVector<f64, N>) -> SVector<f64, M>;
    /// ∂h/∂x at x.
    fn jacobian(&self, x: &SVector<f64, N>) -> SMatrix<f64, M, N>;
    /// R, the measurement noise covariance.
    fn noise(&self) -> SMatrix<f64, M, M>;
    /// z ⊖ ẑ: the innovation, with angles wrapped to [−π, π).
    fn residual(&self, z: &SVector<f64, M>, zhat: &SVector<f64, M>) -> SVector<f64, M> {
        z - zhat
    }
}

/// Wrap an angle (rad) to the half-open interval [−π, π).
#[inline]
pub fn wrap_angle(a: f64) -> f64 {
    let w = (a + PI).rem_euclid(2.0 * PI) - PI;
    // rem_euclid can return exactly 2π for tiny negative inputs after rounding.
    if w >= PI { w - 2.0 * PI } else { w }
}

/// Bearing (rad, clockwise from north, in [0, 2π)) of the vector (dx east, dy north).
#[inline]
pub fn bearing_of(dx: f64, dy: f64) -> f64 {
    dx.atan2(dy).rem_euclid(2.0 * PI)
}

/// Cartesian position measurement z = (x, y) with independent noise σ on each axis (m).
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct CartesianPosition {
    r: Matrix2<f64>,
}

impl CartesianPosition {
    /// Noise standard deviation `sigma` (m, > 0) per axis.
    pub fn new(sigma: f64) -> Result<Self> {
        check_positive("cartesian position noise sigma (m)", sigma)?;
        Ok(Self {
            r: Matrix2::identity() * sigma * sigma,
        })
    }

    /// A full 2×2 noise covariance (m²), which must be symmetric positive definite.
    pub fn with_covariance(r: Matrix2<f64>) -> Result<Self> {
        if r.iter().any(|v| !v.is_finite())
            || (r[(0, 1)] - r[(1, 0)]).abs() > 1e-12 * r.abs().max()
            || r.cholesky().is_none()
        {
            return Err(Error::param(
                "cartesian noise covariance must be finite, symmetric and positive definite",
            ));
        }
        Ok(Self { r })
    }
}

impl<const N: usize> MeasurementModel<N, 2> for CartesianPosition {
    fn predict(&self, x: &SVector<f64, N>) -> Vector2<f64> {
        Vector2::new(x[0], x[1])
    }
    fn jacobian(&self, _x: &SVector<f64, N>) -> SMatrix<f64, 2, N> {
        let mut h = SMatrix::<f64, 2, N>::zeros();
        h[(0, 0)] = 1.0;
        h[(1, 1)] = 1.0;
        h
    }
    fn noise(&self) -> Matrix2<f64> {
        self.r
    }
}

/// Minimum range used in Jacobians (m): below it the bearing is undefined; the state is clamped
/// to this distance so that H stays finite.
const MIN_RANGE: f64 = 1e-6;

/// Polar measurement z = (r, b) of range (m) and bearing (rad, clockwise from north) from a
/// sensor at site position (sx, sy):
/// r = √(dx² + dy²), b = atan2(dx, dy), dx = x − sx, dy = y − sy.
/// Jacobian: ∂r/∂(x, y) = (dx, dy)/r, ∂b/∂(x, y) = (dy, −dx)/r².
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct RangeBearing {
    /// Sensor position in the site frame (m).
    pub position: [f64; 2],
    sigma_range: f64,
    sigma_bearing: f64,
}

impl RangeBearing {
    /// Sensor at `position` (m) with range noise `sigma_range` (m) and bearing noise
    /// `sigma_bearing_deg` (degrees), both > 0.
    pub fn new(position: [f64; 2], sigma_range: f64, sigma_bearing_deg: f64) -> Result<Self> {
        if position.iter().any(|v| !v.is_finite()) {
            return Err(Error::param("sensor position must be finite"));
        }
        check_positive("range noise sigma (m)", sigma_range)?;
        check_positive("bearing noise sigma (deg)", sigma_bearing_deg)?;
        Ok(Self {
            position,
            sigma_range,
            sigma_bearing: sigma_bearing_deg.to_radians(),
        })
    }

    /// Range noise σ_r (m).
    pub fn sigma_range(&self) -> f64 {
        self.sigma_range
    }

    /// Bearing noise σ_b (rad).
    pub fn sigma_bearing(&self) -> f64 {
        self.sigma_bearing
    }

    fn delta<const N: usize>(&self, x: &SVector<f64, N>) -> (f64, f64, f64) {
        let dx = x[0] - self.position[0];
        let dy = x[1] - self.position[1];
        let r = (dx * dx + dy * dy).sqrt().max(MIN_RANGE);
        (dx, dy, r)
    }
}

impl<const N: usize> MeasurementModel<N, 2> for RangeBearing {
    fn predict(&self, x: &SVector<f64, N>) -> Vector2<f64> {
        let (dx, dy, r) = self.delta(x);
        Vector2::new(r, bearing_of(dx, dy))
    }
    fn jacobian(&self, x: &SVector<f64, N>) -> SMatrix<f64, 2, N> {
        let (dx, dy, r) = self.delta(x);
        let mut h = SMatrix::<f64, 2, N>::zeros();
        h[(0, 0)] = dx / r;
        h[(0, 1)] = dy / r;
        h[(1, 0)] = dy / (r * r);
        h[(1, 1)] = -dx / (r * r);
        h
    }
    fn noise(&self) -> Matrix2<f64> {
        Matrix2::new(
            self.sigma_range.powi(2),
            0.0,
            0.0,
            self.sigma_bearing.powi(2),
        )
    }
    fn residual(&self, z: &Vector2<f64>, zhat: &Vector2<f64>) -> Vector2<f64> {
        Vector2::new(z[0] - zhat[0], wrap_angle(z[1] - zhat[1]))
    }
}

/// Polar measurement with range rate: z = (r, b, ṙ), ṙ = (dx vx + dy vy) / r (m/s, positive
/// when the range opens). Jacobian of ṙ: ∂/∂(x, y) = ((vx, vy) − ṙ (dx, dy)/r)/r,
/// ∂/∂(vx, vy) = (dx, dy)/r.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct RangeBearingRate {
    /// The range/bearing part.
    pub polar: RangeBearing,
    sigma_range_rate: f64,
}

impl RangeBearingRate {
    /// A polar sensor that also measures range rate with noise `sigma_range_rate` (m/s, > 0).
    pub fn new(polar: RangeBearing, sigma_range_rate: f64) -> Result<Self> {
        check_positive("range-rate noise sigma (m/s)", sigma_range_rate)?;
        Ok(Self {
            polar,
            sigma_range_rate,
        })
    }
}

impl<const N: usize> MeasurementModel<N, 3> for RangeBearingRate {
    fn predict(&self, x: &SVector<f64, N>) -> SVector<f64, 3> {
        let (dx, dy, r) = self.polar.delta(x);
        SVector::<f64, 3>::new(r, bearing_of(dx, dy), (dx * x[2] + dy * x[3]) / r)
    }
    fn jacobian(&self, x: &SVector<f64, N>) -> SMatrix<f64, 3, N> {
        let (dx, dy, r) = self.polar.delta(x);
        let rr = (dx * x[2] + dy * x[3]) / r;
        let mut h = SMatrix::<f64, 3, N>::zeros();
        h[(0, 0)] = dx / r;
        h[(0, 1)] = dy / r;
        h[(1, 0)] = dy / (r * r);
        h[(1, 1)] = -dx / (r * r);
        h[(2, 0)] = (x[2] - rr * dx / r) / r;
        h[(2, 1)] = (x[3] - rr * dy / r) / r;
        h[(2, 2)] = dx / r;
        h[(2, 3)] = dy / r;
        h
    }
    fn noise(&self) -> SMatrix<f64, 3, 3> {
        SMatrix::<f64, 3, 3>::from_diagonal(&SVector::<f64, 3>::new(
            self.polar.sigma_range.powi(2),
            self.polar.sigma_bearing.powi(2),
            self.sigma_range_rate.powi(2),
        ))
    }
    fn residual(&self, z: &SVector<f64, 3>, zhat: &SVector<f64, 3>) -> SVector<f64, 3> {
        SVector::<f64, 3>::new(z[0] - zhat[0], wrap_angle(z[1] - zhat[1]), z[2] - zhat[2])
    }
}

/// Method for converting a polar measurement to a cartesian position with a covariance.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Conversion {
    /// First-order: z = (r sin b, r cos b), R = J diag(σ_r², σ_b²) Jᵀ with
    /// J = [[sin b, r cos b], [cos b, −r sin b]].
    Linearised,
    /// Unbiased converted measurement, multiplicative debiasing z = λ_b⁻¹ (r sin b, r cos b),
    /// λ_b = e^{−σ_b²/2} (Mo, Song, Zhou, Sun & Bar-Shalom, IEEE TAES 34(3), 1998).
    Unbiased,
    /// Additive debiasing (Lerro & Bar-Shalom, IEEE TAES 29(3), 1993), in the north-clockwise
    /// bearing convention.
    Debiased,
}

/// A polar measurement (range r in m, bearing b in rad clockwise from north) from a sensor at
/// `origin`, converted to a site-frame position and covariance (m, m²) by `method`.
///
/// Formulas (all from the sources in [`Conversion`]; s = sin b, c = cos b, λ′ = e^{−2σ_b²}):
/// the unbiased form's covariance is
/// R_xx = (λ_b⁻² − 2) r² s² + ½ (r² + σ_r²)(1 − λ′ cos 2b),
/// R_yy = (λ_b⁻² − 2) r² c² + ½ (r² + σ_r²)(1 + λ′ cos 2b),
/// R_xy = (λ_b⁻² − 2) r² s c + ½ (r² + σ_r²) λ′ sin 2b.
pub fn polar_to_cartesian(
    origin: [f64; 2],
    range: f64,
    bearing: f64,
    sigma_range: f64,
    sigma_bearing: f64,
    method: Conversion,
) -> Result<(Vector2<f64>, Matrix2<f64>)> {
    if !(range.is_finite() && bearing.is_finite()) {
        return Err(Error::input(format!(
            "polar measurement must be finite, got range {range}, bearing {bearing}"
        )));
    }
    check_non_negative("range (m)", range)?;
    check_positive("range noise sigma (m)", sigma_range)?;
    check_positive("bearing noise sigma (rad)", sigma_bearing)?;
    let (s, c) = bearing.sin_cos();
    let (r, sr2, sb2) = (
        range,
        sigma_range * sigma_range,
        sigma_bearing * sigma_bearing,
    );
    let o = Vector2::new(origin[0], origin[1]);
    Ok(match method {
        Conversion::Linearised => {
            let xx = sr2 * s * s + r * r * sb2 * c * c;
            let yy = sr2 * c * c + r * r * sb2 * s * s;
            let xy = (sr2 - r * r * sb2) * s * c;
            (o + Vector2::new(r * s, r * c), Matrix2::new(xx, xy, xy, yy))
        }
        Conversion::Unbiased => {
            let lb = (-sb2 / 2.0).exp();
            let lp = (-2.0 * sb2).exp();
            let k = lb.powi(-2) - 2.0;
            let h = 0.5 * (r * r + sr2);
            let c2 = (2.0 * bearing).cos();
            let s2 = (2.0 * bearing).sin();
            let xx = k * r * r * s * s + h * (1.0 - lp * c2);
            let yy = k * r * r * c * c + h * (1.0 + lp * c2);
            let xy = k * r * r * s * c + h * lp * s2;
            (
                o + Vector2::new(r * s, r * c) / lb,
                Matrix2::new(xx, xy, xy, yy),
            )
        }
        Conversion::Debiased => {
            let e1 = (-sb2).exp();
            let e_half = (-sb2 / 2.0).exp();
            let mu = Vector2::new(r * s, r * c) * (e1 - e_half);
            let e2 = (-2.0 * sb2).exp();
            let (ch2, ch1, sh2, sh1) = (
                (2.0 * sb2).cosh(),
                sb2.cosh(),
                (2.0 * sb2).sinh(),
                sb2.sinh(),
            );
            let xx = r * r * e2 * (s * s * (ch2 - ch1) + c * c * (sh2 - sh1))
                + sr2 * e2 * (s * s * (2.0 * ch2 - ch1) + c * c * (2.0 * sh2 - sh1));
            let yy = r * r * e2 * (c * c * (ch2 - ch1) + s * s * (sh2 - sh1))
                + sr2 * e2 * (c * c * (2.0 * ch2 - ch1) + s * s * (2.0 * sh2 - sh1));
            let xy = s * c * (-4.0 * sb2).exp() * (sr2 + (r * r + sr2) * (1.0 - sb2.exp()));
            (
                o + Vector2::new(r * s, r * c) - mu,
                Matrix2::new(xx, xy, xy, yy),
            )
        }
    })
}

/// Parameters of the scaled unscented transform (Julier 2002; Wan & van der Merwe 2000):
/// λ = α² (n + κ) − n, weights W₀ᵐ = λ/(n+λ), W₀ᶜ = W₀ᵐ + 1 − α² + β, Wᵢ = 1/(2(n+λ)).
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct UnscentedParams {
    /// Spread α, in (0, 1]; default 1.
    pub alpha: f64,
    /// Prior-knowledge parameter β, 2 is optimal for Gaussian priors.
    pub beta: f64,
    /// Secondary scaling κ; default 0.
    pub kappa: f64,
}

impl Default for UnscentedParams {
    fn default() -> Self {
        Self {
            alpha: 1.0,
            beta: 2.0,
            kappa: 0.0,
        }
    }
}

/// Unscented update preparation: propagates 2N+1 sigma points of `prior` through the
/// measurement model and returns the moments (ẑ, S = Pzz + R, Pxz) as a [`PreparedUpdate`].
///
/// Residuals of the sigma points are formed with the model's `residual` (so bearings are
/// averaged as wrapped differences around the central point, not as raw angles).
pub fn unscented_prepare<const N: usize, const M: usize, Mm: MeasurementModel<N, M>>(
    prior: &Gaussian<N>,
    model: &Mm,
    params: UnscentedParams,
) -> Result<PreparedUpdate<N, M>> {
    let n = N as f64;
    let lambda = params.alpha * params.alpha * (n + params.kappa) - n;
    let scaled = prior.cov() * (n + lambda);
    let chol = ((scaled + scaled.transpose()) * 0.5 + SMatrix::<f64, N, N>::identity() * 1e-12)
        .cholesky()
        .ok_or_else(|| {
            Error::input("state covariance is not positive definite for the unscented transform")
        })?;
    let l = chol.l();
    let wm0 = lambda / (n + lambda);
    let wc0 = wm0 + 1.0 - params.alpha * params.alpha + params.beta;
    let wi = 1.0 / (2.0 * (n + lambda));
    let z0 = model.predict(prior.mean());
    // Sigma-point measurements expressed as residuals around z0.
    let mut dz: Vec<(SVector<f64, N>, SVector<f64, M>)> = Vec::with_capacity(2 * N + 1);
    dz.push((SVector::zeros(), SVector::zeros()));
    for i in 0..N {
        let col = l.column(i).into_owned();
        for sign in [1.0, -1.0] {
            let xs = prior.mean() + col * sign;
            dz.push((col * sign, model.residual(&model.predict(&xs), &z0)));
        }
    }
    let mut mean_dz = dz[0].1 * wm0;
    for (_, d) in &dz[1..] {
        mean_dz += d * wi;
    }
    let mut pzz = SMatrix::<f64, M, M>::zeros();
    let mut pxz = SMatrix::<f64, N, M>::zeros();
    for (k, (dx, d)) in dz.iter().enumerate() {
        let w = if k == 0 { wc0 } else { wi };
        let e = d - mean_dz;
        pzz += e * e.transpose() * w;
        pxz += dx * e.transpose() * w;
    }
    // ẑ = z0 ⊕ mean residual; the model's residual re-wraps angles when it is used.
    let zhat = z0 + mean_dz;
    PreparedUpdate::from_moments(zhat, pzz + model.noise(), pxz, None, model.noise())
}

#[cfg(test)]
mod tests {
    use super::*;
    use proptest::prelude::*;

    fn rel(a: f64, b: f64) -> f64 {
        ((a - b) / b).abs()
    }

    #[test]
    fn wrap_is_half_open_around_zero() {
        assert_eq!(wrap_angle(PI), -PI);
        assert_eq!(wrap_angle(-PI), -PI);
        assert!((wrap_angle(3.0 * PI / 2.0) + PI / 2.0).abs() < 1e-15);
        assert!((wrap_angle(0.1 - 2.0 * PI) - 0.1).abs() < 1e-15);
        let rb = RangeBearing::new([0.0, 0.0], 1.0, 1.0).unwrap();
        // 359° measured against a predicted 1° is a −2° innovation, not +358°.
        let nu = <RangeBearing as MeasurementModel<4, 2>>::residual(
            &rb,
            &Vector2::new(10.0, 359f64.to_radians()),
            &Vector2::new(10.0, 1f64.to_radians()),
        );
        assert!((nu[1] - (-2f64).to_radians()).abs() < 1e-12);
    }

    #[test]
    fn bearing_is_clockwise_from_north() {
        assert!((bearing_of(0.0, 1.0)).abs() < 1e-15);
        assert!((bearing_of(1.0, 0.0) - PI / 2.0).abs() < 1e-15);
        assert!((bearing_of(0.0, -1.0) - PI).abs() < 1e-15);
        assert!((bearing_of(-1.0, 0.0) - 3.0 * PI / 2.0).abs() < 1e-15);
    }

    // check-values.md §9: r = 2000 m, b = 30°, σ_r = 10 m, σ_b = 0.5° and 5°.
    #[test]
    fn converted_measurements_match_worked_example() {
        let (r, b) = (2000.0, 30f64.to_radians());
        let cases = [
            (
                0.5f64,
                [253.46306484003, -88.60194179606, 151.15435494668],
                (1000.0380779024, 1732.1167604305),
                [253.45817370166, -88.58342483686, 151.17084535118],
                (-0.0380750027, -0.0659478392),
                [253.45029522450, -88.58327401275, 151.16314103055],
            ),
            (
                5.0,
                [22871.306484003, -13147.019928339, 7690.435494668],
                (1003.8149763145, 1738.6585403752),
                [22785.352473088, -12897.437697605, 7892.674219950],
                (-3.7860339527, -6.5576031652),
                [22614.490515638, -12801.740146464, 7832.314276324],
            ),
        ];
        for (sb_deg, lin, zu, ru, mua, ra) in cases {
            let sb = sb_deg.to_radians();
            let (z, c) =
                polar_to_cartesian([0.0, 0.0], r, b, 10.0, sb, Conversion::Linearised).unwrap();
            assert!((z[0] - 1000.0).abs() < 1e-9 && (z[1] - 1732.0508075688772).abs() < 1e-9);
            assert!(
                rel(c[(0, 0)], lin[0]) < 1e-10
                    && rel(c[(0, 1)], lin[1]) < 1e-10
                    && rel(c[(1, 1)], lin[2]) < 1e-10
            );
            let (z, c) =
                polar_to_cartesian([0.0, 0.0], r, b, 10.0, sb, Conversion::Unbiased).unwrap();
            assert!(
                rel(z[0], zu.0) < 1e-9 && rel(z[1], zu.1) < 1e-9,
                "σ_b={sb_deg}"
            );
            assert!(
                rel(c[(0, 0)], ru[0]) < 1e-9
                    && rel(c[(0, 1)], ru[1]) < 1e-9
                    && rel(c[(1, 1)], ru[2]) < 1e-9
            );
            let (z, c) =
                polar_to_cartesian([0.0, 0.0], r, b, 10.0, sb, Conversion::Debiased).unwrap();
            assert!(
                rel(1000.0 - z[0], mua.0) < 1e-7 && rel(1732.0508075688772 - z[1], mua.1) < 1e-7
            );
            assert!(
                rel(c[(0, 0)], ra[0]) < 1e-9
                    && rel(c[(0, 1)], ra[1]) < 1e-9
                    && rel(c[(1, 1)], ra[2]) < 1e-9,
                "{c}"
            );
        }
    }

    fn fd<const M: usize, Mm: MeasurementModel<4, M>>(
        m: &Mm,
        x: &SVector<f64, 4>,
    ) -> SMatrix<f64, M, 4> {
        let mut j = SMatrix::<f64, M, 4>::zeros();
        for c in 0..4 {
            let h = 1e-5;
            let (mut xp, mut xm) = (*x, *x);
            xp[c] += h;
            xm[c] -= h;
            let d = m.residual(&m.predict(&xp), &m.predict(&xm)) / (2.0 * h);
            j.set_column(c, &d);
        }
        j
    }

    proptest! {
        // Jacobians agree with central finite differences within 1e-6 relative.
        #[test]
        fn polar_jacobians_match_finite_differences(
            x in -5000.0..5000.0f64, y in -5000.0..5000.0f64, vx in -20.0..20.0f64, vy in -20.0..20.0f64)
        {
            prop_assume!((x - 100.0).hypot(y + 50.0) > 50.0);
            let p = RangeBearing::new([100.0, -50.0], 5.0, 0.5).unwrap();
            let pr = RangeBearingRate::new(p, 0.5).unwrap();
            let s = SVector::<f64, 4>::new(x, y, vx, vy);
            let a = <RangeBearingRate as MeasurementModel<4, 3>>::jacobian(&pr, &s);
            let n = fd::<3, _>(&pr, &s);
            prop_assert!((a - n).abs().max() < 1e-6 * (1.0 + a.abs().max()), "{a} vs {n}");
        }
    }

    // For a linear model the unscented transform is exact: it must reproduce the EKF moments.
    #[test]
    fn unscented_equals_kalman_for_linear_model() {
        let g = Gaussian::new(
            SVector::<f64, 4>::new(10.0, 20.0, 1.0, -1.0),
            SMatrix::<f64, 4, 4>::from_diagonal(&SVector::<f64, 4>::new(25.0, 16.0, 4.0, 1.0)),
        )
        .unwrap();
        let m = CartesianPosition::new(3.0).unwrap();
        let e = g.prepare::<2, _>(&m).unwrap();
        let u = unscented_prepare::<4, 2, _>(&g, &m, UnscentedParams::default()).unwrap();
        assert!((e.s - u.s).abs().max() < 1e-9);
        assert!((e.gain - u.gain).abs().max() < 1e-9);
        assert!((e.zhat - u.zhat).abs().max() < 1e-9);
    }

    // Near the sensor a polar measurement is strongly non-linear; the UT's S must still be close
    // to the Monte Carlo covariance of h(x) + w (checked against 200 000 draws, seed fixed).
    #[test]
    fn unscented_polar_matches_monte_carlo() {
        use rand::SeedableRng;
        use rand_distr::{Distribution, StandardNormal};
        let g = Gaussian::new(
            SVector::<f64, 4>::new(300.0, 400.0, 0.0, 0.0),
            SMatrix::<f64, 4, 4>::from_diagonal(&SVector::<f64, 4>::new(2500.0, 2500.0, 1.0, 1.0)),
        )
        .unwrap();
        let m = RangeBearing::new([0.0, 0.0], 5.0, 0.5).unwrap();
        let u = unscented_prepare::<4, 2, _>(&g, &m, UnscentedParams::default()).unwrap();
        let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(7);
        let n = 200_000;
        let mut sum = Vector2::zeros();
        let mut samples = Vec::with_capacity(n);
        for _ in 0..n {
            let dx: f64 = StandardNormal.sample(&mut rng);
            let dy: f64 = StandardNormal.sample(&mut rng);
            let x = SVector::<f64, 4>::new(300.0 + 50.0 * dx, 400.0 + 50.0 * dy, 0.0, 0.0);
            let wr: f64 = StandardNormal.sample(&mut rng);
            let wb: f64 = StandardNormal.sample(&mut rng);
            let z = <RangeBearing as MeasurementModel<4, 2>>::predict(&m, &x)
                + Vector2::new(5.0 * wr, 0.5f64.to_radians() * wb);
            let d = <RangeBearing as MeasurementModel<4, 2>>::residual(&m, &z, &u.zhat);
            sum += d;
            samples.push(d);
        }
        let mean = sum / n as f64;
        let mut cov = Matrix2::zeros();
        for d in &samples {
            cov += (d - mean) * (d - mean).transpose();
        }
        cov /= n as f64;
        assert!(rel(u.s[(0, 0)], cov[(0, 0)]) < 0.03, "{} vs {}", u.s, cov);
        assert!(rel(u.s[(1, 1)], cov[(1, 1)]) < 0.03, "{} vs {}", u.s, cov);
    }
}
