//! Gaussian state estimates and the Kalman update in Joseph form.
//!
//! [`Gaussian`] holds a mean and a covariance and guarantees, by construction, that both are
//! finite and that the covariance is symmetric positive semi-definite. [`PreparedUpdate`]
//! does the per-track work of a measurement update once (predicted measurement, Jacobian,
//! innovation covariance, its inverse and the gain), so that gating many detections and
//! forming many hypotheses against one track costs a few multiply-adds each.

use nalgebra::{SMatrix, SVector};

use crate::error::{Error, ErrorKind, Result};
use crate::measurement::MeasurementModel;
use crate::stats;

/// Relative tolerance for the symmetry check of a covariance given to [`Gaussian::new`].
const SYMMETRY_TOL: f64 = 1e-9;

/// A Gaussian density N(x; m, P) over an N-dimensional state.
///
/// Invariants: every entry of `mean` and `cov` is finite, `cov` is symmetric and positive
/// semi-definite. Units are those of the state (metres and metres per second for the site
/// frame models).
#[derive(Debug, Clone, PartialEq)]
pub struct Gaussian<const N: usize> {
    mean: SVector<f64, N>,
    cov: SMatrix<f64, N, N>,
}

impl<const N: usize> Gaussian<N> {
    /// A Gaussian with the given mean and covariance.
    ///
    /// Errors (kind [`ErrorKind::InvalidInput`]) when an entry is not finite, the covariance is
    /// not symmetric to 1e-9 relative, or it has a negative eigenvalue (beyond round-off).
    pub fn new(mean: SVector<f64, N>, cov: SMatrix<f64, N, N>) -> Result<Self> {
        if mean.iter().any(|v| !v.is_finite()) {
            return Err(Error::input(format!(
                "state mean must be finite, got {:?}",
                mean.as_slice()
            )));
        }
        if cov.iter().any(|v| !v.is_finite()) {
            return Err(Error::input("state covariance must be finite"));
        }
        let scale = cov.iter().fold(0.0_f64, |a, v| a.max(v.abs())).max(1e-300);
        for i in 0..N {
            for j in (i + 1)..N {
                if (cov[(i, j)] - cov[(j, i)]).abs() > SYMMETRY_TOL * scale {
                    return Err(Error::input(format!(
                        "state covariance must be symmetric, entry ({i},{j}) is {} but ({j},{i}) is {}",
                        cov[(i, j)],
                        cov[(j, i)]
                    )));
                }
            }
        }
        let sym = (cov + cov.transpose()) * 0.5;
        // Positive semi-definite up to round-off: P + ε I must have a Cholesky factor.
        let jitter = SMatrix::<f64, N, N>::identity() * (1e-9 * scale);
        if (sym + jitter).cholesky().is_none() {
            return Err(Error::input(
                "state covariance must be positive semi-definite (it has a negative eigenvalue)",
            ));
        }
        Ok(Self { mean, cov: sym })
    }

    /// Internal constructor for results of updates that keep the invariants by construction.
    #[inline]
    pub(crate) fn from_parts(mean: SVector<f64, N>, cov: SMatrix<f64, N, N>) -> Self {
        Self { mean, cov }
    }

    /// The mean.
    #[inline]
    pub fn mean(&self) -> &SVector<f64, N> {
        &self.mean
    }

    /// The covariance (symmetric, positive semi-definite).
    #[inline]
    pub fn cov(&self) -> &SMatrix<f64, N, N> {
        &self.cov
    }

    /// Checks that the state is still usable (finite); used after long chains of updates.
    #[inline]
    pub fn is_finite(&self) -> bool {
        // `&` rather than `&&`/`all`: no branch per element (the tracker runs this on every
        // track every scan).
        let finite = |s: &[f64]| s.iter().fold(true, |ok, v| ok & v.is_finite());
        finite(self.mean.as_slice()) & finite(self.cov.as_slice())
    }

    /// Prepare a measurement update of this (predicted) state with `model`: linearise at the
    /// mean (EKF) and compute the innovation covariance S = H P Hᵀ + R, its inverse and the
    /// gain K = P Hᵀ S⁻¹.
    #[inline]
    pub fn prepare<const M: usize, Mm: MeasurementModel<N, M>>(
        &self,
        model: &Mm,
    ) -> Result<PreparedUpdate<N, M>> {
        let zhat = model.predict(&self.mean);
        let h = model.jacobian(&self.mean);
        let r = model.noise();
        let pht = mm(&self.cov, &h.transpose());
        let s = mm(&h, &pht) + r;
        PreparedUpdate::from_moments(zhat, s, pht, Some(h), r)
    }
}

/// One measurement update of one predicted state, prepared once and applied to any number of
/// candidate measurements.
///
/// For a predicted state N(x; x⁻, P⁻) and measurement model z = h(x) + w, w ~ N(0, R):
/// ẑ = h(x⁻), S = H P⁻ Hᵀ + R, K = P⁻ Hᵀ S⁻¹, and for an innovation ν = z ⊖ ẑ the updated state
/// is x⁺ = x⁻ + K ν with the Joseph-form covariance
/// P⁺ = (I − K H) P⁻ (I − K H)ᵀ + K R Kᵀ (Bucy & Joseph 1968; Bar-Shalom, Li & Kirubarajan,
/// *Estimation with Applications to Tracking and Navigation*, 2001, §5.2.3), which stays
/// symmetric positive semi-definite under round-off. For an unscented update (no H) the
/// equivalent P⁺ = P⁻ − K S Kᵀ is used and symmetrised.
#[derive(Debug, Clone)]
pub struct PreparedUpdate<const N: usize, const M: usize> {
    /// Predicted measurement ẑ.
    pub zhat: SVector<f64, M>,
    /// Innovation covariance S (measurement units squared).
    pub s: SMatrix<f64, M, M>,
    /// S⁻¹.
    pub s_inv: SMatrix<f64, M, M>,
    /// Kalman gain K.
    pub gain: SMatrix<f64, N, M>,
    /// det S, when S is small enough for the closed form (ln is taken only when a likelihood
    /// is asked for: the plain Kalman update never needs it).
    det_s: f64,
    /// ln det S, computed on first use (NaN until then).
    ln_det_s: std::cell::Cell<f64>,
    h: Option<SMatrix<f64, M, N>>,
    r: SMatrix<f64, M, M>,
}

impl<const N: usize, const M: usize> PreparedUpdate<N, M> {
    /// Build from predicted measurement moments: ẑ, S, and the cross covariance Pxz
    /// (= P Hᵀ in the linearised case). `h` is the Jacobian when known (enables Joseph form).
    #[inline]
    pub fn from_moments(
        zhat: SVector<f64, M>,
        s: SMatrix<f64, M, M>,
        cross: SMatrix<f64, N, M>,
        h: Option<SMatrix<f64, M, N>>,
        r: SMatrix<f64, M, M>,
    ) -> Result<Self> {
        let s = (s + s.transpose()) * 0.5;
        let singular = || {
            Error::new(
                ErrorKind::Singular,
                "innovation covariance is not positive definite (check the sensor noise settings)",
            )
        };
        let (s_inv, det_s, ln_det) = if let Some(small) = small_spd_inverse(&s) {
            let (inv, det) = small.ok_or_else(singular)?;
            (inv, det, f64::NAN)
        } else {
            let chol = s.cholesky().ok_or_else(singular)?;
            let l = chol.l_dirty();
            let mut ln_det = 0.0;
            for i in 0..M {
                ln_det += 2.0 * l[(i, i)].ln();
            }
            (chol.inverse(), f64::NAN, ln_det)
        };
        let gain = mm(&cross, &s_inv);
        Ok(Self {
            zhat,
            s,
            s_inv,
            gain,
            det_s,
            ln_det_s: std::cell::Cell::new(ln_det),
            h,
            r,
        })
    }

    /// Squared Mahalanobis distance d² = νᵀ S⁻¹ ν of an innovation.
    #[inline]
    pub fn d2(&self, nu: &SVector<f64, M>) -> f64 {
        (nu.transpose() * self.s_inv * nu)[(0, 0)]
    }

    /// (det S, ln det S) as far as known without taking a logarithm: for the closed-form sizes
    /// det S and NaN, otherwise NaN and ln det S. [`PreparedUpdate::ln_det_s`] of the same update
    /// is `det.ln()` in the first case.
    #[inline]
    pub(crate) fn det_parts(&self) -> (f64, f64) {
        (self.det_s, self.ln_det_s.get())
    }

    /// ln det S.
    #[inline]
    pub fn ln_det_s(&self) -> f64 {
        let v = self.ln_det_s.get();
        if v.is_nan() {
            let l = self.det_s.ln();
            self.ln_det_s.set(l);
            l
        } else {
            v
        }
    }

    /// ln N(ν; 0, S) from the squared distance.
    #[inline]
    pub fn ln_likelihood_from_d2(&self, d2: f64) -> f64 {
        stats::normal_ln_from_parts(d2, self.ln_det_s(), M)
    }

    /// Covariance after an update with a known measurement: Joseph form when the Jacobian is
    /// known, otherwise P − K S Kᵀ symmetrised.
    #[inline]
    pub fn posterior_cov(&self, prior: &SMatrix<f64, N, N>) -> SMatrix<f64, N, N> {
        let p = match &self.h {
            Some(h) => {
                let i_kh = SMatrix::<f64, N, N>::identity() - mm(&self.gain, h);
                let kr = mm(&self.gain, &self.r);
                mm(&mm(&i_kh, prior), &i_kh.transpose()) + mm(&kr, &self.gain.transpose())
            }
            None => prior - mm(&mm(&self.gain, &self.s), &self.gain.transpose()),
        };
        (p + p.transpose()) * 0.5
    }

    /// The updated Gaussian for innovation ν (x⁺ = x⁻ + K ν, Joseph-form covariance).
    #[inline]
    pub fn apply(&self, prior: &Gaussian<N>, nu: &SVector<f64, M>) -> Gaussian<N> {
        Gaussian::from_parts(prior.mean + self.gain * nu, self.posterior_cov(&prior.cov))
    }
}

/// Matrix product by plain loops over the static sizes. LLVM unrolls and vectorises these
/// completely; nalgebra's generic product is not always inlined at these tiny sizes.
#[inline(always)]
pub(crate) fn mm<const A: usize, const B: usize, const C: usize>(
    x: &SMatrix<f64, A, B>,
    y: &SMatrix<f64, B, C>,
) -> SMatrix<f64, A, C> {
    let mut out = SMatrix::<f64, A, C>::zeros();
    for c in 0..C {
        for k in 0..B {
            let ykc = y[(k, c)];
            for r in 0..A {
                out[(r, c)] += x[(r, k)] * ykc;
            }
        }
    }
    out
}

/// Closed-form inverse and det of a symmetric matrix of size 1, 2 or 3 (`None` for other
/// sizes); the inner `None` when it is not positive definite (Sylvester's criterion: every
/// leading principal minor positive).
fn small_spd_inverse<const M: usize>(
    s: &SMatrix<f64, M, M>,
) -> Option<Option<(SMatrix<f64, M, M>, f64)>> {
    let mut inv = SMatrix::<f64, M, M>::zeros();
    let det = match M {
        1 => {
            let a = s[(0, 0)];
            inv[(0, 0)] = 1.0 / a;
            a
        }
        2 => {
            let (a, b, d) = (s[(0, 0)], s[(0, 1)], s[(1, 1)]);
            let det = a * d - b * b;
            if !(a > 0.0 && det > 0.0) {
                return Some(None);
            }
            inv[(0, 0)] = d / det;
            inv[(1, 1)] = a / det;
            inv[(0, 1)] = -b / det;
            inv[(1, 0)] = -b / det;
            det
        }
        3 => {
            let (a, b, c, d, e, f) = (
                s[(0, 0)],
                s[(0, 1)],
                s[(0, 2)],
                s[(1, 1)],
                s[(1, 2)],
                s[(2, 2)],
            );
            let (c00, c01, c02) = (d * f - e * e, c * e - b * f, b * e - c * d);
            let det = a * c00 + b * c01 + c * c02;
            if !(a > 0.0 && a * d - b * b > 0.0 && det > 0.0) {
                return Some(None);
            }
            let (c11, c12, c22) = (a * f - c * c, b * c - a * e, a * d - b * b);
            let v = [[c00, c01, c02], [c01, c11, c12], [c02, c12, c22]];
            for (r, row) in v.iter().enumerate() {
                for (k, x) in row.iter().enumerate() {
                    inv[(r, k)] = x / det;
                }
            }
            det
        }
        _ => return None,
    };
    if !(det > 0.0 && det.is_finite()) {
        return Some(None);
    }
    Some(Some((inv, det)))
}

#[cfg(test)]
mod tests {
    use super::*;
    use nalgebra::{Matrix2, Matrix3, Vector2};

    // The closed forms agree with nalgebra's general inverse and determinant.
    #[test]
    fn small_inverse_matches_general_inverse() {
        let s2 = Matrix2::new(4.0, 1.0, 1.0, 3.0);
        let (i2, l2) = small_spd_inverse(&s2).unwrap().unwrap();
        assert!((i2 - s2.try_inverse().unwrap()).abs().max() < 1e-15);
        assert!((l2 - 11.0).abs() < 1e-12);
        let s3 = Matrix3::new(9.0, 2.0, 0.0, 2.0, 4.0, 1.0, 0.0, 1.0, 1.0);
        let (i3, l3) = small_spd_inverse(&s3).unwrap().unwrap();
        assert!((i3 - s3.try_inverse().unwrap()).abs().max() < 1e-15);
        assert!((l3 - s3.determinant()).abs() < 1e-12);
        assert!(
            small_spd_inverse(&Matrix2::new(1.0, 2.0, 2.0, 1.0))
                .unwrap()
                .is_none()
        );
    }

    use crate::measurement::{CartesianPosition, RangeBearing};
    use crate::motion::{ConstantVelocity, MotionModel};
    use nalgebra::{Matrix4, Vector4};
    use proptest::prelude::*;

    fn psd(p: &Matrix4<f64>) -> bool {
        let scale = p.abs().max().max(1e-300);
        (p - p.transpose()).abs().max() <= 1e-12 * scale
            && (p + Matrix4::identity() * (1e-10 * scale))
                .cholesky()
                .is_some()
    }

    proptest! {
        // Long random predict/update sequences (cartesian and polar, time steps from 1 ms to
        // 100 s, measurements anywhere within 100 km, noise from centimetres to kilometres)
        // keep the covariance symmetric positive semi-definite and everything finite.
        #[test]
        fn covariance_stays_symmetric_psd(
            steps in proptest::collection::vec(
                (1e-3..100.0f64, any::<bool>(), -1e5..1e5f64, -1e5..1e5f64, 1e-2..1e3f64), 1..200))
        {
            let cv = ConstantVelocity::continuous(0.5).unwrap();
            let mut g = Gaussian::new(Vector4::new(10.0, 20.0, 1.0, 1.0), Matrix4::identity() * 100.0).unwrap();
            for (dt, polar, x, y, sigma) in steps {
                g = cv.predict(&g, dt).unwrap();
                if polar {
                    let m = RangeBearing::new([0.0, 0.0], sigma, (sigma / 100.0).min(10.0)).unwrap();
                    let z = nalgebra::Vector2::new(x.hypot(y), crate::measurement::bearing_of(x, y));
                    if let Ok(prep) = g.prepare::<2, _>(&m) {
                        let nu = <RangeBearing as MeasurementModel<4, 2>>::residual(&m, &z, &prep.zhat);
                        g = prep.apply(&g, &nu);
                    }
                } else {
                    let m = CartesianPosition::new(sigma).unwrap();
                    let prep = g.prepare::<2, _>(&m).unwrap();
                    let nu = nalgebra::Vector2::new(x, y) - prep.zhat;
                    g = prep.apply(&g, &nu);
                }
                prop_assert!(g.is_finite());
                prop_assert!(psd(g.cov()), "{}", g.cov());
            }
        }
    }

    #[test]
    fn rejects_bad_covariances_with_reasons() {
        let m = Vector2::new(0.0, 0.0);
        let e = Gaussian::new(m, Matrix2::new(1.0, 0.0, 0.5, 1.0)).unwrap_err();
        assert!(e.to_string().contains("symmetric"), "{e}");
        let e = Gaussian::new(m, Matrix2::new(1.0, 2.0, 2.0, 1.0)).unwrap_err();
        assert!(e.to_string().contains("positive semi-definite"), "{e}");
        let e = Gaussian::new(Vector2::new(f64::NAN, 0.0), Matrix2::identity()).unwrap_err();
        assert!(e.to_string().contains("finite"), "{e}");
        assert!(Gaussian::new(m, Matrix2::zeros()).is_ok());
    }
}
