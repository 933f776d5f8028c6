//! Motion models in the 2-D site frame (x east, y north, metres; velocities m/s).
//!
//! State layouts share a prefix so that measurement models work with all of them:
//! positions at indices 0, 1 and velocities at 2, 3.
//!
//! | model | state | process noise |
//! |---|---|---|
//! | [`ConstantVelocity`] | x, y, vx, vy | continuous (CWNA, default) or discrete (DWNA) white-noise acceleration |
//! | [`ConstantAcceleration`] | x, y, vx, vy, ax, ay | continuous white-noise jerk (Wiener-process acceleration) |
//! | [`CoordinatedTurn`] | x, y, vx, vy, ω | CWNA on position/velocity plus a random walk on ω; EKF linearisation |
//!
//! **Choice of process noise.** The tracker uses the continuous white-noise acceleration model
//! (CWNA) by default because scans of several asynchronous sensors arrive at irregular
//! intervals: CWNA is consistent under splitting of the interval
//! (Q(t₁+t₂) = F(t₂) Q(t₁) F(t₂)ᵀ + Q(t₂)), so the uncertainty added over a second does not
//! depend on how many scans fell into it. The discrete model (DWNA, piecewise-constant
//! acceleration) is kept because its steady-state gains are the closed-form α–β gains of
//! Kalata's tracking index, which a test checks, and because single-sensor users who tune with
//! α–β rules of thumb think in it. Both are from Bar-Shalom, Li & Kirubarajan, *Estimation with
//! Applications to Tracking and Navigation*, Wiley 2001, §6.2.2 (CWNA) and §6.3.2 (DWNA).
//!
//! Every model treats dt = 0 as a no-op and returns [`ErrorKind::NegativeTimeStep`] for dt < 0.

use nalgebra::{SMatrix, SVector};

use crate::error::{Error, ErrorKind, Result, check_non_negative};
use crate::gaussian::Gaussian;

/// State of the constant-velocity model: x, y (m), vx, vy (m/s).
pub type CvState = SVector<f64, 4>;

/// A motion model x_{k+1} = f(x_k, dt) + w_k, w_k ~ N(0, Q(dt)).
pub trait MotionModel<const N: usize> {
    /// f(x, dt).
    fn transition(&self, x: &SVector<f64, N>, dt: f64) -> SVector<f64, N>;
    /// ∂f/∂x at x (the F matrix for linear models).
    fn jacobian(&self, x: &SVector<f64, N>, dt: f64) -> SMatrix<f64, N, N>;
    /// Q(dt), the covariance of the process noise accumulated over dt.
    fn process_noise(&self, x: &SVector<f64, N>, dt: f64) -> SMatrix<f64, N, N>;

    /// Predict `g` forward by `dt` seconds: x⁻ = f(x), P⁻ = F P Fᵀ + Q (EKF for non-linear f).
    ///
    /// dt = 0 returns the state unchanged; dt < 0 is an error of kind
    /// [`ErrorKind::NegativeTimeStep`]; a non-finite dt is [`ErrorKind::InvalidInput`].
    fn predict(&self, g: &Gaussian<N>, dt: f64) -> Result<Gaussian<N>> {
        check_dt(dt)?;
        if dt == 0.0 {
            return Ok(g.clone());
        }
        let f = self.jacobian(g.mean(), dt);
        let mean = self.transition(g.mean(), dt);
        let p = f * g.cov() * f.transpose() + self.process_noise(g.mean(), dt);
        Ok(Gaussian::from_parts(mean, (p + p.transpose()) * 0.5))
    }
}

/// Validate a time step: finite and not negative.
#[inline]
pub fn check_dt(dt: f64) -> Result<()> {
    if !dt.is_finite() {
        return Err(Error::input(format!("time step must be finite, got {dt}")));
    }
    if dt < 0.0 {
        return Err(Error::new(
            ErrorKind::NegativeTimeStep,
            format!(
                "time step must not be negative, got {dt} s (scans must be applied in time order)"
            ),
        ));
    }
    Ok(())
}

/// Which white-noise acceleration model a [`ConstantVelocity`] uses.
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum ProcessNoise {
    /// Continuous white-noise acceleration with power spectral density q̃ (m²/s³):
    /// Q = q̃ [[T³/3, T²/2], [T²/2, T]] per axis (BLK 2001 §6.2.2).
    Continuous {
        /// q̃, m²/s³.
        q: f64,
    },
    /// Discrete (piecewise-constant) white-noise acceleration with standard deviation σ_a (m/s²):
    /// Q = σ_a² [[T⁴/4, T³/2], [T³/2, T²]] per axis (BLK 2001 §6.3.2).
    Discrete {
        /// σ_a, m/s².
        sigma_a: f64,
    },
}

/// Nearly-constant-velocity motion in the plane, state (x, y, vx, vy).
///
/// F = [[I, T I], [0, I]]; Q per [`ProcessNoise`], the same on both axes, no cross-axis terms.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct ConstantVelocity {
    noise: ProcessNoise,
}

impl ConstantVelocity {
    /// CWNA model with spectral density `q` (m²/s³, ≥ 0). A rough guide: q ≈ σ_a² T for a
    /// manoeuvre acceleration σ_a over a scan period T.
    pub fn continuous(q: f64) -> Result<Self> {
        check_non_negative("process noise spectral density q (m²/s³)", q)?;
        Ok(Self {
            noise: ProcessNoise::Continuous { q },
        })
    }

    /// DWNA model with acceleration standard deviation `sigma_a` (m/s², ≥ 0).
    pub fn discrete(sigma_a: f64) -> Result<Self> {
        check_non_negative("process noise acceleration sigma_a (m/s²)", sigma_a)?;
        Ok(Self {
            noise: ProcessNoise::Discrete { sigma_a },
        })
    }

    /// The process-noise model in use.
    pub fn noise(&self) -> ProcessNoise {
        self.noise
    }

    /// The per-axis 2×2 blocks (position-position, position-velocity, velocity-velocity) of Q.
    #[inline]
    fn q_blocks(&self, t: f64) -> (f64, f64, f64) {
        match self.noise {
            ProcessNoise::Continuous { q } => (q * t * t * t / 3.0, q * t * t / 2.0, q * t),
            ProcessNoise::Discrete { sigma_a } => {
                let v = sigma_a * sigma_a;
                (v * t.powi(4) / 4.0, v * t * t * t / 2.0, v * t * t)
            }
        }
    }
}

impl MotionModel<4> for ConstantVelocity {
    #[inline]
    fn transition(&self, x: &CvState, dt: f64) -> CvState {
        CvState::new(x[0] + dt * x[2], x[1] + dt * x[3], x[2], x[3])
    }

    fn jacobian(&self, _x: &CvState, dt: f64) -> SMatrix<f64, 4, 4> {
        let mut f = SMatrix::<f64, 4, 4>::identity();
        f[(0, 2)] = dt;
        f[(1, 3)] = dt;
        f
    }

    fn process_noise(&self, _x: &CvState, dt: f64) -> SMatrix<f64, 4, 4> {
        let (pp, pv, vv) = self.q_blocks(dt);
        let mut q = SMatrix::<f64, 4, 4>::zeros();
        for a in 0..2 {
            q[(a, a)] = pp;
            q[(a, a + 2)] = pv;
            q[(a + 2, a)] = pv;
            q[(a + 2, a + 2)] = vv;
        }
        q
    }

    /// Specialised predict: the block structure of F makes F P Fᵀ a handful of additions.
    #[inline]
    fn predict(&self, g: &Gaussian<4>, dt: f64) -> Result<Gaussian<4>> {
        check_dt(dt)?;
        if dt == 0.0 {
            return Ok(g.clone());
        }
        let p = g.cov();
        // P' = F P Fᵀ with F = [[I, T I],[0, I]], computed as (F P) Fᵀ by rows/columns.
        let mut fp = *p;
        for c in 0..4 {
            fp[(0, c)] += dt * p[(2, c)];
            fp[(1, c)] += dt * p[(3, c)];
        }
        let mut out = fp;
        for r in 0..4 {
            out[(r, 0)] += dt * fp[(r, 2)];
            out[(r, 1)] += dt * fp[(r, 3)];
        }
        let (pp, pv, vv) = self.q_blocks(dt);
        for a in 0..2 {
            out[(a, a)] += pp;
            out[(a, a + 2)] += pv;
            out[(a + 2, a)] += pv;
            out[(a + 2, a + 2)] += vv;
        }
        Ok(Gaussian::from_parts(self.transition(g.mean(), dt), out))
    }
}

/// Nearly-constant-acceleration motion, state (x, y, vx, vy, ax, ay).
///
/// Per axis F = [[1, T, T²/2], [0, 1, T], [0, 0, 1]] and the Wiener-process acceleration
/// (continuous white-noise jerk) Q = q [[T⁵/20, T⁴/8, T³/6], [T⁴/8, T³/3, T²/2], [T³/6, T²/2, T]],
/// q in m²/s⁵ (BLK 2001 §6.2.3).
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct ConstantAcceleration {
    q: f64,
}

impl ConstantAcceleration {
    /// A model with jerk spectral density `q` (m²/s⁵, ≥ 0).
    pub fn new(q: f64) -> Result<Self> {
        check_non_negative("jerk spectral density q (m²/s⁵)", q)?;
        Ok(Self { q })
    }
}

impl MotionModel<6> for ConstantAcceleration {
    fn transition(&self, x: &SVector<f64, 6>, dt: f64) -> SVector<f64, 6> {
        self.jacobian(x, dt) * x
    }

    fn jacobian(&self, _x: &SVector<f64, 6>, dt: f64) -> SMatrix<f64, 6, 6> {
        let mut f = SMatrix::<f64, 6, 6>::identity();
        for a in 0..2 {
            f[(a, a + 2)] = dt;
            f[(a, a + 4)] = dt * dt / 2.0;
            f[(a + 2, a + 4)] = dt;
        }
        f
    }

    fn process_noise(&self, _x: &SVector<f64, 6>, dt: f64) -> SMatrix<f64, 6, 6> {
        let t = dt;
        let block = [
            [t.powi(5) / 20.0, t.powi(4) / 8.0, t.powi(3) / 6.0],
            [t.powi(4) / 8.0, t.powi(3) / 3.0, t * t / 2.0],
            [t.powi(3) / 6.0, t * t / 2.0, t],
        ];
        let mut q = SMatrix::<f64, 6, 6>::zeros();
        for a in 0..2 {
            let idx = [a, a + 2, a + 4];
            for (i, &r) in idx.iter().enumerate() {
                for (j, &c) in idx.iter().enumerate() {
                    q[(r, c)] = self.q * block[i][j];
                }
            }
        }
        q
    }
}

/// Nearly-coordinated-turn motion with the turn rate in the state: (x, y, vx, vy, ω), ω in
/// rad/s, positive counter-clockwise (a left turn, seen from above in the east-north frame).
///
/// f(x) (BLK 2001 §11.7.1):
/// x' = x + (sin ωT / ω) vx − ((1 − cos ωT) / ω) vy,
/// y' = y + ((1 − cos ωT) / ω) vx + (sin ωT / ω) vy,
/// vx' = cos ωT vx − sin ωT vy, vy' = sin ωT vx + cos ωT vy, ω' = ω,
/// with the limits sin ωT / ω → T and (1 − cos ωT)/ω → 0 as ω → 0 (series used for |ωT| < 1e-4).
/// Process noise: CWNA with density `q` (m²/s³) on position/velocity and a random walk of
/// density `q_omega` (rad²/s³) on ω. Linearised by its analytic Jacobian (EKF).
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct CoordinatedTurn {
    q: f64,
    q_omega: f64,
}

impl CoordinatedTurn {
    /// A model with acceleration density `q` (m²/s³) and turn-rate density `q_omega` (rad²/s³).
    pub fn new(q: f64, q_omega: f64) -> Result<Self> {
        check_non_negative("process noise spectral density q (m²/s³)", q)?;
        check_non_negative("turn-rate noise density q_omega (rad²/s³)", q_omega)?;
        Ok(Self { q, q_omega })
    }
}

/// (sin ωT/ω, (1−cos ωT)/ω, d/dω of the first, d/dω of the second), with series near ω = 0.
fn turn_coefficients(w: f64, t: f64) -> (f64, f64, f64, f64) {
    let wt = w * t;
    if wt.abs() < 1e-4 {
        // Taylor series to the order that keeps the relative error below 1e-12.
        let a = t - w * w * t * t * t / 6.0;
        let b = w * t * t / 2.0 - w * w * w * t.powi(4) / 24.0;
        let da = -w * t * t * t / 3.0;
        let db = t * t / 2.0 - w * w * t.powi(4) / 8.0;
        (a, b, da, db)
    } else {
        let (s, c) = wt.sin_cos();
        (
            s / w,
            (1.0 - c) / w,
            (t * c * w - s) / (w * w),
            (t * s * w - (1.0 - c)) / (w * w),
        )
    }
}

impl MotionModel<5> for CoordinatedTurn {
    fn transition(&self, x: &SVector<f64, 5>, dt: f64) -> SVector<f64, 5> {
        let (a, b, _, _) = turn_coefficients(x[4], dt);
        let (s, c) = (x[4] * dt).sin_cos();
        SVector::<f64, 5>::new(
            x[0] + a * x[2] - b * x[3],
            x[1] + b * x[2] + a * x[3],
            c * x[2] - s * x[3],
            s * x[2] + c * x[3],
            x[4],
        )
    }

    fn jacobian(&self, x: &SVector<f64, 5>, dt: f64) -> SMatrix<f64, 5, 5> {
        let (a, b, da, db) = turn_coefficients(x[4], dt);
        let (s, c) = (x[4] * dt).sin_cos();
        let (vx, vy) = (x[2], x[3]);
        let mut f = SMatrix::<f64, 5, 5>::identity();
        f[(0, 2)] = a;
        f[(0, 3)] = -b;
        f[(1, 2)] = b;
        f[(1, 3)] = a;
        f[(2, 2)] = c;
        f[(2, 3)] = -s;
        f[(3, 2)] = s;
        f[(3, 3)] = c;
        f[(0, 4)] = da * vx - db * vy;
        f[(1, 4)] = db * vx + da * vy;
        f[(2, 4)] = -dt * s * vx - dt * c * vy;
        f[(3, 4)] = dt * c * vx - dt * s * vy;
        f
    }

    fn process_noise(&self, _x: &SVector<f64, 5>, dt: f64) -> SMatrix<f64, 5, 5> {
        let t = dt;
        let (pp, pv, vv) = (self.q * t * t * t / 3.0, self.q * t * t / 2.0, self.q * t);
        let mut q = SMatrix::<f64, 5, 5>::zeros();
        for a in 0..2 {
            q[(a, a)] = pp;
            q[(a, a + 2)] = pv;
            q[(a + 2, a)] = pv;
            q[(a + 2, a + 2)] = vv;
        }
        q[(4, 4)] = self.q_omega * t;
        q
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use nalgebra::{Matrix2, Vector2};
    use proptest::prelude::*;

    fn cv_state() -> Gaussian<4> {
        Gaussian::new(
            CvState::new(10.0, -5.0, 3.0, 1.0),
            SMatrix::<f64, 4, 4>::from_diagonal(&CvState::new(100.0, 80.0, 4.0, 9.0)),
        )
        .unwrap()
    }

    #[test]
    fn zero_step_is_noop_and_negative_step_is_an_error() {
        let m = ConstantVelocity::continuous(1.0).unwrap();
        let g = cv_state();
        assert_eq!(m.predict(&g, 0.0).unwrap(), g);
        let e = m.predict(&g, -0.5).unwrap_err();
        assert_eq!(e.kind(), ErrorKind::NegativeTimeStep);
        assert!(e.to_string().contains("-0.5"));
        assert_eq!(
            m.predict(&g, f64::NAN).unwrap_err().kind(),
            ErrorKind::InvalidInput
        );
    }

    #[test]
    fn specialised_cv_predict_equals_generic_f_p_ft_plus_q() {
        for m in [
            ConstantVelocity::continuous(0.7).unwrap(),
            ConstantVelocity::discrete(0.3).unwrap(),
        ] {
            let g = cv_state();
            let fast = m.predict(&g, 1.7).unwrap();
            let f = m.jacobian(g.mean(), 1.7);
            let slow = f * g.cov() * f.transpose() + m.process_noise(g.mean(), 1.7);
            assert!((fast.cov() - slow).abs().max() < 1e-12);
            assert_eq!(fast.mean(), &(f * g.mean()));
        }
    }

    // CWNA is consistent under splitting the interval (BLK 2001 §6.2.2); DWNA is not.
    #[test]
    fn cwna_is_consistent_under_splitting_dwna_is_not() {
        let g = cv_state();
        let c = ConstantVelocity::continuous(0.5).unwrap();
        let once = c.predict(&g, 2.0).unwrap();
        let twice = c.predict(&c.predict(&g, 0.8).unwrap(), 1.2).unwrap();
        assert!((once.cov() - twice.cov()).abs().max() < 1e-12);
        let d = ConstantVelocity::discrete(0.5).unwrap();
        let once = d.predict(&g, 2.0).unwrap();
        let twice = d.predict(&d.predict(&g, 0.8).unwrap(), 1.2).unwrap();
        assert!((once.cov() - twice.cov()).abs().max() > 1e-3);
    }

    // Steady-state gain of the DWNA constant-velocity filter with a position measurement equals
    // the α–β gains of Kalata's tracking index (Kalata 1984, IEEE AES-20(2); values in
    // check-values.md §4, verified there against scipy's DARE).
    #[test]
    fn dwna_steady_state_gain_matches_kalata_alpha_beta() {
        use crate::measurement::CartesianPosition;
        let cases = [
            (1.0, 0.5, 10.0, [0.270867118992628, 0.042694639037219]),
            (0.1, 2.0, 5.0, [0.085552542062366, 0.038250698460292]),
            (2.0, 0.2, 30.0, [0.206111296667335, 0.011880057637965]),
        ];
        for (t, sw, sv, want) in cases {
            let m = ConstantVelocity::discrete(sw).unwrap();
            let h = CartesianPosition::new(sv).unwrap();
            let mut g = Gaussian::new(
                CvState::zeros(),
                SMatrix::<f64, 4, 4>::from_diagonal(&CvState::new(1e4, 1e4, 1e2, 1e2)),
            )
            .unwrap();
            let mut gain = (0.0, 0.0);
            for _ in 0..20_000 {
                g = m.predict(&g, t).unwrap();
                let prep = g.prepare(&h).unwrap();
                gain = (prep.gain[(0, 0)], prep.gain[(2, 0)]);
                g = Gaussian::from_parts(*g.mean(), prep.posterior_cov(g.cov()));
            }
            assert!(
                (gain.0 - want[0]).abs() < 1e-9,
                "α for T={t}: {} vs {}",
                gain.0,
                want[0]
            );
            assert!(
                (gain.1 - want[1]).abs() < 1e-9,
                "β/T for T={t}: {} vs {}",
                gain.1,
                want[1]
            );
        }
    }

    // The closed-form α, β from the tracking index λ (Kalata 1984; check-values.md §4).
    #[test]
    fn kalata_closed_form_identity() {
        for (lam, a, b) in [
            (0.1, 0.36, 0.08),
            (1.0, 0.75, 0.5),
            (2.0, 0.854101966249685, 0.763932022500210),
        ] {
            let r: f64 = lam * lam + 8.0 * lam;
            let alpha = (-(lam * lam + 8.0 * lam) + (lam + 4.0) * r.sqrt()) / 8.0;
            let beta = (lam * lam + 4.0 * lam - lam * r.sqrt()) / 4.0;
            assert!((alpha - a).abs() < 1e-12 && (beta - b).abs() < 1e-12);
            assert!((beta * beta / (1.0 - alpha) - lam * lam).abs() < 1e-12);
        }
    }

    #[test]
    fn coordinated_turn_keeps_speed_and_turns_left_for_positive_rate() {
        let m = CoordinatedTurn::new(0.0, 0.0).unwrap();
        let w = 0.1_f64; // rad/s
        let x = SVector::<f64, 5>::new(0.0, 0.0, 10.0, 0.0, w);
        let t = std::f64::consts::PI / w; // half a circle
        let y = m.transition(&x, t);
        assert!((y[2] + 10.0).abs() < 1e-9 && y[3].abs() < 1e-9);
        // half a circle of radius v/ω = 100 m to the left (north) ends at (0, 200).
        assert!(y[0].abs() < 1e-9 && (y[1] - 200.0).abs() < 1e-9);
        let straight = m.transition(&SVector::<f64, 5>::new(0.0, 0.0, 10.0, 5.0, 0.0), 3.0);
        assert!((straight[0] - 30.0).abs() < 1e-12 && (straight[1] - 15.0).abs() < 1e-12);
    }

    fn finite_diff_jacobian(
        m: &CoordinatedTurn,
        x: &SVector<f64, 5>,
        t: f64,
    ) -> SMatrix<f64, 5, 5> {
        let mut j = SMatrix::<f64, 5, 5>::zeros();
        for c in 0..5 {
            let h = if c == 4 {
                1e-6
            } else {
                1e-4 * x[c].abs().max(1.0)
            };
            let mut xp = *x;
            let mut xm = *x;
            xp[c] += h;
            xm[c] -= h;
            let d = (m.transition(&xp, t) - m.transition(&xm, t)) / (2.0 * h);
            j.set_column(c, &d);
        }
        j
    }

    proptest! {
        // The analytic CT Jacobian agrees with central finite differences (relative 1e-5).
        #[test]
        fn ct_jacobian_matches_finite_differences(
            vx in -30.0..30.0f64, vy in -30.0..30.0f64, w in -0.3..0.3f64, t in 0.05..5.0f64)
        {
            let m = CoordinatedTurn::new(1.0, 0.01).unwrap();
            let x = SVector::<f64, 5>::new(100.0, -50.0, vx, vy, w);
            let a = m.jacobian(&x, t);
            let n = finite_diff_jacobian(&m, &x, t);
            prop_assert!((a - n).abs().max() < 1e-5 * (1.0 + n.abs().max()), "{a} vs {n}");
        }
    }

    #[test]
    fn constant_acceleration_integrates_exactly() {
        let m = ConstantAcceleration::new(0.0).unwrap();
        let x = SVector::<f64, 6>::new(0.0, 0.0, 1.0, 2.0, 0.5, -0.2);
        let y = m.transition(&x, 4.0);
        assert!((y[0] - (4.0 + 0.5 * 0.5 * 16.0)).abs() < 1e-12);
        assert!((y[3] - (2.0 - 0.2 * 4.0)).abs() < 1e-12);
        let q = ConstantAcceleration::new(2.0)
            .unwrap()
            .process_noise(&x, 1.0);
        assert!((q[(0, 0)] - 0.1).abs() < 1e-15 && (q[(4, 4)] - 2.0).abs() < 1e-15);
        let _ = (Matrix2::<f64>::zeros(), Vector2::<f64>::zeros());
    }
}
