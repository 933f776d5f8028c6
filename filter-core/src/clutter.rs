//! The per-sensor clutter measurement model and the scan likelihood it implies.
//!
//! # Model
//! In one scan a sensor reports m detections, shuffled into arbitrary order. An object with
//! state x is detected with probability P_D(x) and then yields a measurement z ~ g(z | x).
//! False detections (clutter) are Poisson in number with mean λ̄_c per scan and i.i.d. over the
//! field of view with spatial density f_c(z). The association variable θ is 0 when the object
//! was missed and i when detection i is the object's. By total probability
//!
//! p(Z, m | x) = Σ_θ p(Z | θ, m, x) p(θ, m | x),
//!
//! with p(θ = 0, m | x) = (1 − P_D) Po(m; λ̄_c), p(θ = i, m | x) = P_D Po(m − 1; λ̄_c) / m,
//! p(Z | θ = 0, m, x) = Π_j f_c(z_j) and p(Z | θ = i, m, x) = g(z_i | x) Π_{j ≠ i} f_c(z_j).
//! [`scan_log_likelihood`] evaluates this literally, in the log domain.
//!
//! # Hypothesis weights
//! Dividing every term by the common factor Po(m; λ̄_c) Π_j f_c(z_j) and using
//! Po(m − 1; λ̄_c) / (m Po(m; λ̄_c)) = 1/λ̄_c gives the form filters use:
//! β₀ ∝ 1 − P_D and βᵢ ∝ P_D g(zᵢ | x) / (λ̄_c f_c(zᵢ)). With a validation gate of probability
//! P_G only detections inside the gate are candidates and the missed term becomes 1 − P_D P_G
//! (Bar-Shalom & Tse, Automatica 11, 1975; Bar-Shalom & Fortmann 1988 §6.4).
//! [`hypothesis_weights`] normalises the literal sum; [`association_weights`] is the filter
//! form; tests check that the two agree.
//!
//! # Densities and spaces
//! f_c is uniform over the field of view **in the sensor's measurement space**: for a cartesian
//! sensor 1/area (m⁻²); for a polar sensor 1/((r_max − r_min) Δb) in (range, bearing) space
//! (m⁻¹ rad⁻¹), times 1/(2 ṙ_max) (s m⁻¹) when range rate is measured. The likelihood g is
//! evaluated in the same space, so the ratio P_D g / (λ̄_c f_c) is dimensionless. Moved to the
//! site plane, the same polar clutter has density f_c(r, b) / r per m², since the Jacobian of
//! (x, y) ↦ (r, b) has determinant 1/r: [`Region::density_xy`].

use std::f64::consts::PI;

use crate::error::{Error, Result, check_non_negative, check_positive, check_prob};
use crate::measurement::bearing_of;
use crate::stats;

/// Detection probability P_D, constant or as a function of range.
#[derive(Debug, Clone, PartialEq)]
pub enum DetectionProbability {
    /// The same P_D everywhere in the field of view.
    Constant(f64),
    /// Piecewise-linear in range between the given (range m, P_D) points, held constant beyond
    /// the first and last point. Ranges must increase strictly.
    ByRange(Vec<(f64, f64)>),
}

impl DetectionProbability {
    /// Validate: every P_D in (0, 1], ranges finite and strictly increasing.
    pub fn validate(&self) -> Result<()> {
        match self {
            Self::Constant(p) => check_prob("detection probability", *p, false, true).map(|_| ()),
            Self::ByRange(pts) => {
                if pts.is_empty() {
                    return Err(Error::param(
                        "detection probability table must not be empty",
                    ));
                }
                for (i, &(r, p)) in pts.iter().enumerate() {
                    check_non_negative(&format!("detection probability table range #{i} (m)"), r)?;
                    check_prob(
                        &format!("detection probability table value #{i}"),
                        p,
                        false,
                        true,
                    )?;
                    if i > 0 && r <= pts[i - 1].0 {
                        return Err(Error::param(format!(
                            "detection probability table ranges must increase, #{i} is {r} after {}",
                            pts[i - 1].0
                        )));
                    }
                }
                Ok(())
            }
        }
    }

    /// P_D at range `range` (m).
    pub fn at_range(&self, range: f64) -> f64 {
        match self {
            Self::Constant(p) => *p,
            Self::ByRange(pts) => {
                let i = pts.partition_point(|&(r, _)| r <= range);
                if i == 0 {
                    pts[0].1
                } else if i == pts.len() {
                    pts[pts.len() - 1].1
                } else {
                    let (r0, p0) = pts[i - 1];
                    let (r1, p1) = pts[i];
                    p0 + (p1 - p0) * (range - r0) / (r1 - r0)
                }
            }
        }
    }
}

/// The region a sensor observes, with its clutter density.
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum Region {
    /// An axis-aligned rectangle of the site frame (m), for cartesian sensors.
    Rect {
        /// West edge (m).
        x_min: f64,
        /// East edge (m).
        x_max: f64,
        /// South edge (m).
        y_min: f64,
        /// North edge (m).
        y_max: f64,
    },
    /// An annular sector around a polar sensor at `origin`: ranges in [min_range, max_range]
    /// (m), bearings from `bearing_start` clockwise over `bearing_extent` (rad, (0, 2π]).
    Sector {
        /// Sensor position in the site frame (m).
        origin: [f64; 2],
        /// Minimum range (m).
        min_range: f64,
        /// Maximum range (m).
        max_range: f64,
        /// First bearing of the sector (rad, clockwise from north).
        bearing_start: f64,
        /// Angular width of the sector (rad).
        bearing_extent: f64,
    },
}

impl Region {
    /// Validate the geometry.
    pub fn validate(&self) -> Result<()> {
        match *self {
            Self::Rect {
                x_min,
                x_max,
                y_min,
                y_max,
            } => {
                if ![x_min, x_max, y_min, y_max].iter().all(|v| v.is_finite())
                    || x_min >= x_max
                    || y_min >= y_max
                {
                    return Err(Error::param(format!(
                        "field of view rectangle must have x_min < x_max and y_min < y_max, got x [{x_min}, {x_max}], y [{y_min}, {y_max}]"
                    )));
                }
            }
            Self::Sector {
                origin,
                min_range,
                max_range,
                bearing_start,
                bearing_extent,
            } => {
                if !origin.iter().all(|v| v.is_finite()) || !bearing_start.is_finite() {
                    return Err(Error::param(
                        "field of view sector origin and start bearing must be finite",
                    ));
                }
                check_non_negative("field of view minimum range (m)", min_range)?;
                check_positive("field of view maximum range (m)", max_range)?;
                if min_range >= max_range {
                    return Err(Error::param(format!(
                        "field of view minimum range must be below the maximum, got {min_range} >= {max_range}"
                    )));
                }
                if !(bearing_extent > 0.0 && bearing_extent <= 2.0 * PI + 1e-12) {
                    return Err(Error::param(format!(
                        "field of view bearing extent must be in (0, 360] degrees, got {}",
                        bearing_extent.to_degrees()
                    )));
                }
            }
        }
        Ok(())
    }

    /// Whether the site-frame point (x, y) (m) is inside.
    pub fn contains(&self, x: f64, y: f64) -> bool {
        match *self {
            Self::Rect {
                x_min,
                x_max,
                y_min,
                y_max,
            } => x >= x_min && x <= x_max && y >= y_min && y <= y_max,
            Self::Sector { origin, .. } => {
                let (dx, dy) = (x - origin[0], y - origin[1]);
                self.contains_polar(dx.hypot(dy), bearing_of(dx, dy))
            }
        }
    }

    fn bearing_inside(&self, b: f64, start: f64, extent: f64) -> bool {
        extent >= 2.0 * PI || (b - start).rem_euclid(2.0 * PI) <= extent
    }

    /// Whether a polar measurement (range m, bearing rad) is inside a sector field of view.
    pub fn contains_polar(&self, range: f64, bearing: f64) -> bool {
        match *self {
            Self::Sector {
                min_range,
                max_range,
                bearing_start,
                bearing_extent,
                ..
            } => {
                range >= min_range
                    && range <= max_range
                    && self.bearing_inside(
                        bearing.rem_euclid(2.0 * PI),
                        bearing_start,
                        bearing_extent,
                    )
            }
            Self::Rect { .. } => false,
        }
    }

    /// Volume of the field of view in its measurement space: area (m²) for a rectangle,
    /// (r_max − r_min) Δb (m rad) for a sector.
    pub fn measurement_volume(&self) -> f64 {
        match *self {
            Self::Rect {
                x_min,
                x_max,
                y_min,
                y_max,
            } => (x_max - x_min) * (y_max - y_min),
            Self::Sector {
                min_range,
                max_range,
                bearing_extent,
                ..
            } => (max_range - min_range) * bearing_extent.min(2.0 * PI),
        }
    }

    /// Area of the field of view in the site plane (m²).
    pub fn area(&self) -> f64 {
        match *self {
            Self::Rect { .. } => self.measurement_volume(),
            Self::Sector {
                min_range,
                max_range,
                bearing_extent,
                ..
            } => {
                0.5 * bearing_extent.min(2.0 * PI) * (max_range * max_range - min_range * min_range)
            }
        }
    }

    /// Clutter density f_c in measurement space for uniform clutter: 1 / [`Self::measurement_volume`].
    pub fn density(&self) -> f64 {
        1.0 / self.measurement_volume()
    }

    /// The same clutter density expressed per m² of the site plane at range `range` (m) from a
    /// polar sensor: f_c(r, b) / r (Jacobian of the change of variables). For a rectangle, the
    /// density itself.
    pub fn density_xy(&self, range: f64) -> f64 {
        match self {
            Self::Rect { .. } => self.density(),
            Self::Sector { .. } => self.density() / range.max(1e-9),
        }
    }
}

/// The full scan likelihood ln p(Z, m | x) = ln Σ_θ p(Z | θ, m, x) p(θ, m | x), evaluated
/// literally as the sum over θ ∈ {0, 1, …, m} in the log domain (see the module docs).
///
/// - `ln_g[i]` = ln g(zᵢ | x), the object's measurement density at detection i (−∞ allowed);
/// - `ln_fc[i]` = ln f_c(zᵢ), the clutter density at detection i, in the same space;
/// - `pd` = P_D(x), `clutter_rate` = λ̄_c (mean clutter count per scan).
///
/// Errors when the slices differ in length or a parameter is out of range.
pub fn scan_log_likelihood(ln_g: &[f64], ln_fc: &[f64], pd: f64, clutter_rate: f64) -> Result<f64> {
    Ok(stats::log_sum_exp(&hypothesis_log_terms(
        ln_g,
        ln_fc,
        pd,
        clutter_rate,
    )?))
}

/// The m + 1 terms ln [p(Z | θ, m, x) p(θ, m | x)] of [`scan_log_likelihood`], θ = 0 first.
pub fn hypothesis_log_terms(
    ln_g: &[f64],
    ln_fc: &[f64],
    pd: f64,
    clutter_rate: f64,
) -> Result<Vec<f64>> {
    if ln_g.len() != ln_fc.len() {
        return Err(Error::input(format!(
            "scan likelihood needs one clutter density per detection, got {} likelihoods and {} densities",
            ln_g.len(),
            ln_fc.len()
        )));
    }
    check_prob("detection probability", pd, true, true)?;
    check_non_negative("clutter rate (per scan)", clutter_rate)?;
    let m = ln_g.len() as u64;
    let sum_fc: f64 = ln_fc.iter().sum();
    let mut terms = Vec::with_capacity(ln_g.len() + 1);
    terms.push((1.0 - pd).ln() + stats::poisson_ln_pmf(m, clutter_rate) + sum_fc);
    for i in 0..ln_g.len() {
        let prior = pd.ln() + stats::poisson_ln_pmf(m - 1, clutter_rate) - (m as f64).ln();
        terms.push(prior + ln_g[i] + sum_fc - ln_fc[i]);
    }
    Ok(terms)
}

/// Normalised association probabilities β_θ = p(θ | Z, m, x), θ = 0 first, from the literal
/// hypothesis sum of [`scan_log_likelihood`].
pub fn hypothesis_weights(
    ln_g: &[f64],
    ln_fc: &[f64],
    pd: f64,
    clutter_rate: f64,
) -> Result<Vec<f64>> {
    let terms = hypothesis_log_terms(ln_g, ln_fc, pd, clutter_rate)?;
    let total = stats::log_sum_exp(&terms);
    Ok(terms.iter().map(|t| (t - total).exp()).collect())
}

/// Association probabilities in the form filters use, θ = 0 first:
/// β₀ ∝ 1 − P_D P_G, βᵢ ∝ P_D g(zᵢ | x) / κ(zᵢ) for the gated detections i, where
/// κ(z) = λ̄_c f_c(z) is the clutter intensity. `ln_g[i]` = ln g(zᵢ | x), `ln_kappa[i]` = ln κ(zᵢ).
/// With `gate_probability` = 1 this equals [`hypothesis_weights`] exactly.
pub fn association_weights(
    ln_g: &[f64],
    ln_kappa: &[f64],
    pd: f64,
    gate_probability: f64,
) -> Vec<f64> {
    let mut terms = Vec::with_capacity(ln_g.len() + 1);
    terms.push((1.0 - pd * gate_probability).ln());
    for (g, k) in ln_g.iter().zip(ln_kappa) {
        terms.push(pd.ln() + g - k);
    }
    let total = stats::log_sum_exp(&terms);
    terms.iter().map(|t| (t - total).exp()).collect()
}

#[cfg(test)]
mod tests {
    use super::*;
    use nalgebra::{Matrix2, Vector2};
    use proptest::prelude::*;

    // The filter form equals the normalised literal hypothesis sum (no gate: P_G = 1).
    proptest! {
        #[test]
        fn filter_weights_equal_normalised_scan_likelihood(
            ln_g in proptest::collection::vec(-60.0..0.0f64, 0..12),
            fc in 1e-9..1e-2f64, pd in 0.05..0.999f64, lambda in 0.01..60.0f64)
        {
            let ln_fc = vec![fc.ln(); ln_g.len()];
            let lit = hypothesis_weights(&ln_g, &ln_fc, pd, lambda).unwrap();
            let ln_kappa = vec![(lambda * fc).ln(); ln_g.len()];
            let filt = association_weights(&ln_g, &ln_kappa, pd, 1.0);
            let s: f64 = lit.iter().sum();
            prop_assert!((s - 1.0).abs() < 1e-12);
            for (a, b) in lit.iter().zip(&filt) {
                prop_assert!((a - b).abs() < 1e-12, "{lit:?} vs {filt:?}");
            }
        }
    }

    // check-values.md §10 (Bar-Shalom & Tse 1975; Bar-Shalom & Fortmann 1988, from memory):
    // gated PDA weights, and the same weights from the full hypothesis sum with clutter uniform
    // in the gate and the object's density truncated to the gate.
    #[test]
    fn pda_weights_match_reference_and_full_likelihood_in_gate() {
        let s: Matrix2<f64> = Matrix2::new(25.0, 5.0, 5.0, 16.0);
        let nus = [
            Vector2::new(1.0, 2.0),
            Vector2::new(-3.0, 4.0),
            Vector2::new(10.0, -5.0),
        ];
        let lam: f64 = 1e-3;
        let gate = crate::gating::Gate::new(0.99, 2).unwrap();
        let ln_det = s.determinant().ln();
        let ln_g: Vec<f64> = nus
            .iter()
            .map(|n| crate::stats::mvn_ln_pdf(n, &Vector2::zeros(), &s).unwrap())
            .collect();
        let want_n = [
            7.231273773697147e-03,
            3.390854200683037e-03,
            2.172040306561580e-04,
        ];
        for (g, w) in ln_g.iter().zip(want_n) {
            assert!((g.exp() / w - 1.0).abs() < 1e-12);
        }
        let beta = association_weights(&ln_g, &[lam.ln(); 3], 0.9, 0.99);
        let want = [
            0.011049837112214,
            0.659761078732637,
            0.309371999357167,
            0.019817084797983,
        ];
        for (b, w) in beta.iter().zip(want) {
            assert!((b - w).abs() < 1e-12, "{beta:?}");
        }
        // Full likelihood inside the gate: λ̄ = λV clutter uniform over V; target density g/P_G,
        // detected in the gate with probability P_D P_G.
        let v = gate.volume(ln_det);
        assert!((v / 560.326531186798 - 1.0).abs() < 1e-12);
        let ln_g_gate: Vec<f64> = ln_g.iter().map(|g| g - 0.99f64.ln()).collect();
        let lit = hypothesis_weights(&ln_g_gate, &[-(v.ln()); 3], 0.9 * 0.99, lam * v).unwrap();
        for (b, w) in lit.iter().zip(want) {
            assert!((b - w).abs() < 1e-12, "{lit:?}");
        }
        // and the summed density p(Z, m) = 9.387990705326959e-10 (check-values §10)
        let total = scan_log_likelihood(&ln_g_gate, &[-(v.ln()); 3], 0.9 * 0.99, lam * v).unwrap();
        assert!((total.exp() / 9.387990705326959e-10 - 1.0).abs() < 1e-9);
    }

    #[test]
    fn log_domain_does_not_underflow() {
        // 400 detections with tiny densities: the product of f_c underflows in linear space.
        let ln_g = vec![-800.0; 400];
        let ln_fc = vec![-20.0; 400];
        let l = scan_log_likelihood(&ln_g, &ln_fc, 0.9, 400.0).unwrap();
        assert!(l.is_finite() && l < -7000.0);
        let w = hypothesis_weights(&ln_g, &ln_fc, 0.9, 400.0).unwrap();
        assert!((w.iter().sum::<f64>() - 1.0).abs() < 1e-12);
        assert!(scan_log_likelihood(&[0.0], &[], 0.9, 1.0).is_err());
    }

    #[test]
    fn polar_density_and_jacobian() {
        let fov = Region::Sector {
            origin: [0.0, 0.0],
            min_range: 100.0,
            max_range: 6100.0,
            bearing_start: 0.0,
            bearing_extent: 2.0 * PI,
        };
        fov.validate().unwrap();
        let f = fov.density();
        assert!((f - 1.0 / (6000.0 * 2.0 * PI)).abs() < 1e-18);
        // Integrating f_c / r over the plane area of the annulus gives 1.
        let mut total = 0.0;
        let n = 6000;
        for i in 0..n {
            let r = 100.0 + (i as f64 + 0.5);
            total += fov.density_xy(r) * 2.0 * PI * r; // ring of width 1 m
        }
        assert!((total - 1.0).abs() < 1e-9);
        assert!(fov.contains(0.0, 5000.0) && !fov.contains(0.0, 50.0));
        let narrow = Region::Sector {
            origin: [0.0, 0.0],
            min_range: 0.0,
            max_range: 1000.0,
            bearing_start: 350f64.to_radians(),
            bearing_extent: 20f64.to_radians(),
        };
        assert!(narrow.contains(0.0, 500.0) && !narrow.contains(500.0, 0.0));
        assert!(narrow.contains_polar(500.0, 5f64.to_radians()));
    }

    #[test]
    fn detection_probability_by_range_interpolates() {
        let p = DetectionProbability::ByRange(vec![(0.0, 0.95), (4000.0, 0.9), (6000.0, 0.5)]);
        p.validate().unwrap();
        assert!((p.at_range(2000.0) - 0.925).abs() < 1e-12);
        assert!((p.at_range(5000.0) - 0.7).abs() < 1e-12);
        assert_eq!(p.at_range(9000.0), 0.5);
        let bad = DetectionProbability::ByRange(vec![(0.0, 0.9), (0.0, 0.8)]);
        assert!(
            bad.validate()
                .unwrap_err()
                .to_string()
                .contains("must increase")
        );
        assert_eq!(
            DetectionProbability::Constant(1.3)
                .validate()
                .unwrap_err()
                .to_string(),
            "detection probability must be in (0, 1], got 1.3"
        );
    }
}
