//! Single-object filters in clutter: nearest neighbour, probabilistic data association, and a
//! Gaussian-sum filter that keeps the association hypotheses across scans.
//!
//! All three share one [`SingleSetup`] (motion model, measurement model, gate, and the sensor's
//! P_D and clutter intensity) and the same step: predict by dt, gate the scan's detections
//! against the predicted measurement, then update. They are building blocks and yardsticks for
//! the multi-object tracker, and the Monte Carlo test in `tests/single_monte_carlo.rs` compares
//! them with a Kalman filter that is told the true association.

use nalgebra::{SMatrix, SVector};

use crate::clutter::association_weights;
use crate::error::{Error, Result, check_positive, check_prob};
use crate::gating::Gate;
use crate::gaussian::{Gaussian, PreparedUpdate, mm};
use crate::measurement::MeasurementModel;
use crate::motion::MotionModel;

/// What a single-object filter needs to know about its world.
#[derive(Debug, Clone)]
pub struct SingleSetup<Mo, Me> {
    /// Motion model.
    pub motion: Mo,
    /// Measurement model.
    pub measurement: Me,
    /// Validation gate (probability P_G, dimension of the measurement).
    pub gate: Gate,
    /// Detection probability P_D ∈ (0, 1].
    pub detection_probability: f64,
    /// Clutter intensity κ = λ̄_c f_c in measurement space (per unit measurement volume),
    /// assumed uniform.
    pub clutter_intensity: f64,
}

impl<Mo, Me> SingleSetup<Mo, Me> {
    /// A validated setup.
    pub fn new(
        motion: Mo,
        measurement: Me,
        gate: Gate,
        detection_probability: f64,
        clutter_intensity: f64,
    ) -> Result<Self> {
        check_prob("detection probability", detection_probability, false, true)?;
        check_positive(
            "clutter intensity (per unit measurement volume)",
            clutter_intensity,
        )?;
        Ok(Self {
            motion,
            measurement,
            gate,
            detection_probability,
            clutter_intensity,
        })
    }
}

/// What one step of a single-object filter did.
#[derive(Debug, Clone, PartialEq)]
pub struct StepReport {
    /// Detections inside the gate.
    pub gated: usize,
    /// Posterior probability that none of them was the object (1 for NN without a detection,
    /// 0 for NN with one).
    pub missed_probability: f64,
    /// Normalised innovation squared of the innovation that was used (NN: the chosen one; PDA:
    /// the combined innovation), `None` when nothing was used.
    pub nis: Option<f64>,
}

/// The common first half of a step: predict, prepare the update, gate.
/// Returns the prior, the prepared update and (index, innovation, d²) of each gated detection.
type Gated<const N: usize, const M: usize> = (
    Gaussian<N>,
    PreparedUpdate<N, M>,
    Vec<(usize, SVector<f64, M>, f64)>,
);

fn predict_and_gate<const N: usize, const M: usize, Mo, Me>(
    setup: &SingleSetup<Mo, Me>,
    state: &Gaussian<N>,
    dt: f64,
    scan: &[SVector<f64, M>],
) -> Result<Gated<N, M>>
where
    Mo: MotionModel<N>,
    Me: MeasurementModel<N, M>,
{
    if let Some((i, _)) = scan
        .iter()
        .enumerate()
        .find(|(_, z)| z.iter().any(|v| !v.is_finite()))
    {
        return Err(Error::input(format!(
            "detection {i} of the scan is not finite"
        )));
    }
    let prior = setup.motion.predict(state, dt)?;
    let prep = prior.prepare(&setup.measurement)?;
    let mut gated = Vec::new();
    for (i, z) in scan.iter().enumerate() {
        let nu = setup.measurement.residual(z, &prep.zhat);
        let d2 = prep.d2(&nu);
        if setup.gate.accepts(d2) {
            gated.push((i, nu, d2));
        }
    }
    Ok((prior, prep, gated))
}

/// Nearest-neighbour filter: updates with the gated detection of smallest Mahalanobis distance
/// as if it were certainly the object's, coasts when the gate is empty.
#[derive(Debug, Clone)]
pub struct NearestNeighbour<const N: usize, Mo, Me> {
    setup: SingleSetup<Mo, Me>,
    state: Gaussian<N>,
}

impl<const N: usize, Mo: MotionModel<N>, Me> NearestNeighbour<N, Mo, Me> {
    /// A filter starting from `initial`.
    pub fn new(setup: SingleSetup<Mo, Me>, initial: Gaussian<N>) -> Self {
        Self {
            setup,
            state: initial,
        }
    }

    /// The current estimate.
    pub fn estimate(&self) -> &Gaussian<N> {
        &self.state
    }

    /// Predict by `dt` seconds and update with the nearest gated detection of `scan`.
    pub fn step<const M: usize>(&mut self, dt: f64, scan: &[SVector<f64, M>]) -> Result<StepReport>
    where
        Me: MeasurementModel<N, M>,
    {
        let (prior, prep, gated) = predict_and_gate(&self.setup, &self.state, dt, scan)?;
        let best = gated
            .iter()
            .min_by(|a, b| a.2.total_cmp(&b.2).then(a.0.cmp(&b.0)));
        let report = StepReport {
            gated: gated.len(),
            missed_probability: if best.is_some() { 0.0 } else { 1.0 },
            nis: best.map(|b| b.2),
        };
        self.state = match best {
            Some((_, nu, _)) => prep.apply(&prior, nu),
            None => prior,
        };
        Ok(report)
    }
}

/// Probabilistic data association filter (Bar-Shalom & Tse, Automatica 11(5), 1975).
///
/// With gated innovations νᵢ and weights β₀ ∝ 1 − P_D P_G, βᵢ ∝ P_D N(νᵢ; 0, S) / κ:
/// x⁺ = x⁻ + K ν̄, ν̄ = Σ βᵢ νᵢ, and
/// P⁺ = β₀ P⁻ + (1 − β₀) Pᶜ + K (Σ βᵢ νᵢ νᵢᵀ − ν̄ ν̄ᵀ) Kᵀ,
/// where Pᶜ is the Joseph-form covariance of a certain update and the last term is the spread
/// of the innovations (Bar-Shalom & Fortmann 1988, §6.4.2).
#[derive(Debug, Clone)]
pub struct Pda<const N: usize, Mo, Me> {
    setup: SingleSetup<Mo, Me>,
    state: Gaussian<N>,
}

/// The PDA combination of a prepared update with gated innovations and their weights (β₀
/// first). Shared by the single-object PDA filter and the multi-object JPDA update.
#[inline]
pub fn pda_combine<const N: usize, const M: usize>(
    prior: &Gaussian<N>,
    prep: &PreparedUpdate<N, M>,
    innovations: &[SVector<f64, M>],
    beta: &[f64],
) -> Gaussian<N> {
    debug_assert_eq!(innovations.len() + 1, beta.len());
    let b0 = beta[0];
    if innovations.is_empty() || b0 >= 1.0 {
        // Nothing (or nothing with weight) to combine: the prediction stands.
        return prior.clone();
    }
    let pc = prep.posterior_cov(prior.cov());
    let mut nu_bar = SVector::<f64, M>::zeros();
    let mut spread = SMatrix::<f64, M, M>::zeros();
    for (nu, b) in innovations.iter().zip(&beta[1..]) {
        nu_bar += nu * *b;
        spread += mm(&(nu * *b), &nu.transpose());
    }
    spread -= mm(&nu_bar, &nu_bar.transpose());
    let ks = mm(&prep.gain, &spread);
    let p = prior.cov() * b0 + pc * (1.0 - b0) + mm(&ks, &prep.gain.transpose());
    Gaussian::from_parts(
        prior.mean() + mm(&prep.gain, &nu_bar),
        (p + p.transpose()) * 0.5,
    )
}

impl<const N: usize, Mo: MotionModel<N>, Me> Pda<N, Mo, Me> {
    /// A filter starting from `initial`.
    pub fn new(setup: SingleSetup<Mo, Me>, initial: Gaussian<N>) -> Self {
        Self {
            setup,
            state: initial,
        }
    }

    /// The current estimate.
    pub fn estimate(&self) -> &Gaussian<N> {
        &self.state
    }

    /// Predict by `dt` seconds and update with all gated detections of `scan`, weighted.
    pub fn step<const M: usize>(&mut self, dt: f64, scan: &[SVector<f64, M>]) -> Result<StepReport>
    where
        Me: MeasurementModel<N, M>,
    {
        let (prior, prep, gated) = predict_and_gate(&self.setup, &self.state, dt, scan)?;
        let ln_g: Vec<f64> = gated
            .iter()
            .map(|g| prep.ln_likelihood_from_d2(g.2))
            .collect();
        let ln_k = vec![self.setup.clutter_intensity.ln(); gated.len()];
        let beta = association_weights(
            &ln_g,
            &ln_k,
            self.setup.detection_probability,
            self.setup.gate.probability(),
        );
        let nus: Vec<SVector<f64, M>> = gated.iter().map(|g| g.1).collect();
        self.state = pda_combine(&prior, &prep, &nus, &beta);
        let nis = if gated.is_empty() {
            None
        } else {
            let mut nb = SVector::<f64, M>::zeros();
            for (nu, b) in nus.iter().zip(&beta[1..]) {
                nb += nu * (*b / (1.0 - beta[0]));
            }
            Some(prep.d2(&nb))
        };
        Ok(StepReport {
            gated: gated.len(),
            missed_probability: beta[0],
            nis,
        })
    }
}

/// Mixture-reduction parameters of the [`GaussianSum`] filter.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct MixtureParams {
    /// Components whose weight falls below this are dropped (default 1e-3).
    pub prune_below: f64,
    /// Components whose squared Mahalanobis distance from a heavier one (in the heavier one's
    /// position-velocity covariance) is below this are merged into it (default 4.0).
    pub merge_distance: f64,
    /// At most this many components are kept after merging, the heaviest (default 16).
    pub max_components: usize,
}

impl Default for MixtureParams {
    fn default() -> Self {
        Self {
            prune_below: 1e-3,
            merge_distance: 4.0,
            max_components: 16,
        }
    }
}

impl MixtureParams {
    /// Validate the ranges: prune_below in [0, 1), merge_distance ≥ 0, max_components ≥ 1.
    pub fn validate(&self) -> Result<()> {
        check_prob("mixture prune threshold", self.prune_below, true, false)?;
        if !(self.merge_distance.is_finite() && self.merge_distance >= 0.0) {
            return Err(Error::param(format!(
                "mixture merge distance must be finite and >= 0, got {}",
                self.merge_distance
            )));
        }
        if self.max_components == 0 {
            return Err(Error::param(
                "mixture max components must be at least 1, got 0",
            ));
        }
        Ok(())
    }
}

/// Gaussian-sum filter in clutter: every component spawns one child per association
/// hypothesis (missed, or each gated detection), with weight w · (1 − P_D P_G) or
/// w · P_D N(ν; 0, S) / κ; the mixture is normalised, pruned by weight, merged by moment
/// matching and capped (Salmond, "Mixture reduction algorithms for target tracking in clutter",
/// SPIE 1305, 1990). With one component kept this reduces to nearest-hypothesis filtering; with
/// merging into one after every scan it reduces to PDA.
#[derive(Debug, Clone)]
pub struct GaussianSum<const N: usize, Mo, Me> {
    setup: SingleSetup<Mo, Me>,
    params: MixtureParams,
    components: Vec<(f64, Gaussian<N>)>,
}

/// Moment-matched single Gaussian of a weighted mixture (weights need not sum to one).
pub fn moment_match<const N: usize>(components: &[(f64, Gaussian<N>)]) -> Gaussian<N> {
    let total: f64 = components.iter().map(|c| c.0).sum();
    let mut mean = SVector::<f64, N>::zeros();
    for (w, g) in components {
        mean += g.mean() * (*w / total);
    }
    let mut cov = SMatrix::<f64, N, N>::zeros();
    for (w, g) in components {
        let d = g.mean() - mean;
        cov += (g.cov() + d * d.transpose()) * (*w / total);
    }
    Gaussian::from_parts(mean, (cov + cov.transpose()) * 0.5)
}

impl<const N: usize, Mo: MotionModel<N>, Me> GaussianSum<N, Mo, Me> {
    /// A filter starting from one component `initial`.
    pub fn new(
        setup: SingleSetup<Mo, Me>,
        params: MixtureParams,
        initial: Gaussian<N>,
    ) -> Result<Self> {
        params.validate()?;
        Ok(Self {
            setup,
            params,
            components: vec![(1.0, initial)],
        })
    }

    /// The mixture components (weight, Gaussian), weights summing to one, heaviest first.
    pub fn components(&self) -> &[(f64, Gaussian<N>)] {
        &self.components
    }

    /// The moment-matched estimate of the whole mixture.
    pub fn estimate(&self) -> Gaussian<N> {
        moment_match(&self.components)
    }

    /// Predict every component by `dt`, expand by the hypotheses of `scan`, then reduce.
    pub fn step<const M: usize>(&mut self, dt: f64, scan: &[SVector<f64, M>]) -> Result<StepReport>
    where
        Me: MeasurementModel<N, M>,
    {
        let pd = self.setup.detection_probability;
        let ln_miss = (1.0 - pd * self.setup.gate.probability()).ln();
        let ln_k = self.setup.clutter_intensity.ln();
        let mut children: Vec<(f64, Gaussian<N>)> = Vec::new();
        let mut gated_any = std::collections::BTreeSet::new();
        for (w, comp) in &self.components {
            let (prior, prep, gated) = predict_and_gate(&self.setup, comp, dt, scan)?;
            for (i, nu, d2) in &gated {
                gated_any.insert(*i);
                let lw = w.ln() + pd.ln() + prep.ln_likelihood_from_d2(*d2) - ln_k;
                children.push((lw, prep.apply(&prior, nu)));
            }
            children.push((w.ln() + ln_miss, prior));
        }
        // Normalise in the log domain.
        let lws: Vec<f64> = children.iter().map(|c| c.0).collect();
        let total = crate::stats::log_sum_exp(&lws);
        for c in children.iter_mut() {
            c.0 = (c.0 - total).exp();
        }
        // The missed probability is Σ_parents w·(1−P_D P_G) / normaliser.
        let mut missed = 0.0;
        for (w, _) in &self.components {
            missed += (w.ln() + ln_miss - total).exp();
        }
        self.components = reduce(children, &self.params);
        Ok(StepReport {
            gated: gated_any.len(),
            missed_probability: missed,
            nis: None,
        })
    }
}

/// Prune, merge and cap a mixture; returns components heaviest first with weights summing to 1.
fn reduce<const N: usize>(
    mut comps: Vec<(f64, Gaussian<N>)>,
    params: &MixtureParams,
) -> Vec<(f64, Gaussian<N>)> {
    let max_w = comps.iter().map(|c| c.0).fold(0.0, f64::max);
    comps.retain(|c| c.0 >= params.prune_below || c.0 == max_w);
    comps.sort_by(|a, b| b.0.total_cmp(&a.0));
    let mut out: Vec<(f64, Gaussian<N>)> = Vec::new();
    let mut used = vec![false; comps.len()];
    for i in 0..comps.len() {
        if used[i] {
            continue;
        }
        used[i] = true;
        let inv = comps[i].1.cov().try_inverse();
        let mut group = vec![comps[i].clone()];
        if let Some(inv) = inv {
            for j in (i + 1)..comps.len() {
                if used[j] {
                    continue;
                }
                let d = comps[j].1.mean() - comps[i].1.mean();
                let d2 = (d.transpose() * inv * d)[(0, 0)];
                if d2 < params.merge_distance {
                    used[j] = true;
                    group.push(comps[j].clone());
                }
            }
        }
        let w: f64 = group.iter().map(|c| c.0).sum();
        out.push((
            w,
            if group.len() == 1 {
                group
                    .pop()
                    .map(|c| c.1)
                    .unwrap_or_else(|| comps[i].1.clone())
            } else {
                moment_match(&group)
            },
        ));
    }
    out.sort_by(|a, b| b.0.total_cmp(&a.0));
    out.truncate(params.max_components);
    let total: f64 = out.iter().map(|c| c.0).sum();
    for c in out.iter_mut() {
        c.0 /= total;
    }
    out
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::measurement::CartesianPosition;
    use crate::motion::ConstantVelocity;
    use nalgebra::{Matrix2, Matrix4, Vector2, Vector4};

    // check-values.md §10, "PDAF update with the same β" (Bar-Shalom & Tse 1975; Bar-Shalom &
    // Fortmann 1988, from memory): H = I, x⁻ = (100, 50), P⁻ = [[20,4],[4,12]], R = [[5,1],[1,4]].
    #[test]
    fn pda_update_matches_worked_example() {
        let prior = Gaussian::new(
            Vector2::new(100.0, 50.0),
            Matrix2::new(20.0, 4.0, 4.0, 12.0),
        )
        .unwrap();
        struct Identity2;
        impl MeasurementModel<2, 2> for Identity2 {
            fn predict(&self, x: &Vector2<f64>) -> Vector2<f64> {
                *x
            }
            fn jacobian(&self, _x: &Vector2<f64>) -> Matrix2<f64> {
                Matrix2::identity()
            }
            fn noise(&self) -> Matrix2<f64> {
                Matrix2::new(5.0, 1.0, 1.0, 4.0)
            }
        }
        let prep = prior.prepare(&Identity2).unwrap();
        assert!(
            (prep.gain - Matrix2::new(0.8, 0.0, 0.010666666666667, 0.746666666666667))
                .abs()
                .max()
                < 1e-12
        );
        let nus = [
            Vector2::new(1.0, 2.0),
            Vector2::new(-3.0, 4.0),
            Vector2::new(10.0, -5.0),
        ];
        let ln_g: Vec<f64> = nus
            .iter()
            .map(|n| prep.ln_likelihood_from_d2(prep.d2(n)))
            .collect();
        let beta = association_weights(&ln_g, &[1e-3f64.ln(); 3], 0.9, 0.99);
        let post = pda_combine(&prior, &prep, &nus, &beta);
        assert!((post.mean()[0] - 99.943852742913).abs() < 1e-10);
        assert!((post.mean()[1] - 51.834501835647).abs() < 1e-10);
        let want = Matrix2::new(
            7.646168113074,
            -1.036592153897,
            -1.036592153897,
            4.185287460488,
        );
        assert!((post.cov() - want).abs().max() < 1e-10, "{}", post.cov());
    }

    fn setup() -> SingleSetup<ConstantVelocity, CartesianPosition> {
        SingleSetup::new(
            ConstantVelocity::continuous(0.5).unwrap(),
            CartesianPosition::new(10.0).unwrap(),
            Gate::new(0.99, 2).unwrap(),
            0.9,
            1e-4,
        )
        .unwrap()
    }

    fn start() -> Gaussian<4> {
        Gaussian::new(
            Vector4::new(0.0, 0.0, 10.0, 0.0),
            Matrix4::from_diagonal(&Vector4::new(100.0, 100.0, 25.0, 25.0)),
        )
        .unwrap()
    }

    #[test]
    fn filters_coast_on_empty_scans_and_agree_on_a_single_clean_detection() {
        let mut nn = NearestNeighbour::new(setup(), start());
        let mut pda = Pda::new(setup(), start());
        let mut gs = GaussianSum::new(setup(), MixtureParams::default(), start()).unwrap();
        let r = nn.step::<2>(1.0, &[]).unwrap();
        assert_eq!((r.gated, r.missed_probability), (0, 1.0));
        let r = pda.step::<2>(1.0, &[]).unwrap();
        assert_eq!(r.missed_probability, 1.0);
        gs.step::<2>(1.0, &[]).unwrap();
        assert_eq!(nn.estimate().mean(), pda.estimate().mean());
        assert!((gs.estimate().mean() - nn.estimate().mean()).abs().max() < 1e-12);
        // With one detection far outside every gate, nothing changes but the prediction.
        let far = [Vector2::new(5000.0, 5000.0)];
        assert_eq!(pda.step(1.0, &far).unwrap().gated, 0);
        assert!(nn.step(1.0, &[Vector2::new(f64::NAN, 0.0)]).is_err());
    }

    #[test]
    fn gaussian_sum_weights_sum_to_one_and_stay_capped() {
        let params = MixtureParams {
            max_components: 4,
            ..MixtureParams::default()
        };
        let mut gs = GaussianSum::new(setup(), params, start()).unwrap();
        for k in 1..10 {
            let t = k as f64;
            let scan = [
                Vector2::new(10.0 * t + 3.0, 1.0),
                Vector2::new(10.0 * t - 15.0, 12.0),
                Vector2::new(10.0 * t + 20.0, -20.0),
            ];
            let r = gs.step(1.0, &scan).unwrap();
            assert!(r.missed_probability >= 0.0 && r.missed_probability <= 1.0);
            let s: f64 = gs.components().iter().map(|c| c.0).sum();
            assert!((s - 1.0).abs() < 1e-12);
            assert!(gs.components().len() <= 4);
        }
        assert!(
            MixtureParams {
                max_components: 0,
                ..MixtureParams::default()
            }
            .validate()
            .is_err()
        );
    }
}
