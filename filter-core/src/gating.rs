//! Ellipsoidal validation gates.
//!
//! A detection with innovation ν is inside the gate of a predicted measurement with innovation
//! covariance S when d² = νᵀ S⁻¹ ν ≤ γ, where γ = F⁻¹(P_G; n) is the chi-square quantile of the
//! gate probability P_G in measurement dimension n (computed by [`crate::stats::chi2_quantile`],
//! not read from a table). The gate's volume is V = c_n γ^{n/2} √det S with c_n the volume of
//! the unit n-ball (Bar-Shalom & Fortmann, *Tracking and Data Association*, 1988, §2.3.2).
//! A target-originated measurement falls in the gate with probability P_G, so association
//! weights carry the missed-detection term 1 − P_D P_G.

use crate::error::{Result, check_prob};
use crate::stats;

/// An ellipsoidal gate of probability P_G in dimension n.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Gate {
    probability: f64,
    dim: usize,
    threshold: f64,
    ln_unit_volume: f64,
}

impl Gate {
    /// A gate with probability `probability` ∈ (0, 1) for `dim`-dimensional measurements.
    pub fn new(probability: f64, dim: usize) -> Result<Self> {
        check_prob("gate probability", probability, false, false)?;
        let threshold = stats::chi2_quantile(probability, dim)?;
        Ok(Self {
            probability,
            dim,
            threshold,
            ln_unit_volume: stats::unit_ball_volume(dim).ln(),
        })
    }

    /// P_G.
    pub fn probability(&self) -> f64 {
        self.probability
    }

    /// The threshold γ on d².
    pub fn threshold(&self) -> f64 {
        self.threshold
    }

    /// Measurement dimension n.
    pub fn dim(&self) -> usize {
        self.dim
    }

    /// Whether a squared Mahalanobis distance is inside the gate (d² ≤ γ).
    #[inline]
    pub fn accepts(&self, d2: f64) -> bool {
        d2 <= self.threshold
    }

    /// ln V = ln c_n + (n/2) ln γ + ½ ln det S, from ln det S.
    pub fn ln_volume(&self, ln_det_s: f64) -> f64 {
        self.ln_unit_volume + 0.5 * self.dim as f64 * self.threshold.ln() + 0.5 * ln_det_s
    }

    /// V = c_n γ^{n/2} √det S (measurement units to the power n).
    pub fn volume(&self, ln_det_s: f64) -> f64 {
        self.ln_volume(ln_det_s).exp()
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use nalgebra::{Matrix2, Matrix3};

    // check-values.md §1 "Ellipsoidal gate volume" (Bar-Shalom & Fortmann 1988, from memory;
    // verified there against the eigenvalue product and Monte Carlo).
    #[test]
    fn gate_volumes_match_reference() {
        let g1 = Gate::new(0.95, 1).unwrap();
        assert!((g1.volume(2.5f64.ln()) / 6.197950323046 - 1.0).abs() < 1e-10);
        let g2 = Gate::new(0.99, 2).unwrap();
        let s2: Matrix2<f64> = Matrix2::new(4.0, 1.0, 1.0, 3.0);
        assert!((g2.volume(s2.determinant().ln()) / 95.9669948412 - 1.0).abs() < 1e-10);
        // n = 3 with γ = 16 exactly: P_G = chi2.cdf(16, 3) = 0.998866015710 (scipy).
        let mut g3 = Gate::new(0.998866015710, 3).unwrap();
        g3.threshold = 16.0;
        let s3: Matrix3<f64> = Matrix3::new(9.0, 2.0, 0.0, 2.0, 4.0, 1.0, 0.0, 1.0, 1.0);
        assert!((g3.volume(s3.determinant().ln()) / 1285.6788549541 - 1.0).abs() < 1e-10);
    }

    #[test]
    fn threshold_is_the_computed_quantile_and_bad_probability_is_named() {
        assert!((Gate::new(0.99, 2).unwrap().threshold() - 9.2103403720).abs() < 1e-9);
        assert_eq!(
            Gate::new(1.0, 2).unwrap_err().to_string(),
            "gate probability must be in (0, 1), got 1"
        );
    }
}
