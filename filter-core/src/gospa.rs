//! The GOSPA metric (α = 2) between a set of true target positions and a set of track
//! estimates, with its split into localisation, missed-target and false-track parts.
//!
//! This module owns the scoring used to evaluate the tracker against simulated truth. Points
//! are 2-D positions in metres in one Cartesian frame (for instance local east/north); the
//! metric and its parts are in metres (`distance`) and metres to the power `p` (the parts).

use crate::assign::{CostMatrix, solve_any};
use crate::error::{Error, Result, check_positive};

/// Parameters of the GOSPA metric with α = 2.
///
/// * `c`: cut-off distance in metres, `c > 0` and finite. A truth and an estimate farther apart
///   than `c` are never paired; each unpaired point costs `c^p / 2`. Typical values are a few
///   times the expected position error (common practice).
/// * `p`: order, `p ≥ 1` and finite; `p = 2` is the usual choice. Larger `p` weighs outliers
///   more heavily.
///
/// `c^p` must not overflow: it must not exceed [`crate::assign::MAX_FINITE_COST`].
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct GospaParams {
    /// Cut-off distance `c`, metres.
    pub c: f64,
    /// Order `p` (dimensionless).
    pub p: f64,
}

impl GospaParams {
    /// Validated parameters.
    ///
    /// # Errors
    /// [`crate::ErrorKind::InvalidParameter`] if `c` is not finite and positive, `p` is not
    /// finite and at least 1, or `c^p` exceeds [`crate::assign::MAX_FINITE_COST`]. The message
    /// names the parameter and the rule, e.g. `GOSPA cut-off c must be finite and greater than
    /// 0, got -1`.
    pub fn new(c: f64, p: f64) -> Result<Self> {
        check_positive("GOSPA cut-off c", c)?;
        if !(p.is_finite() && p >= 1.0) {
            return Err(Error::param(format!(
                "GOSPA order p must be finite and at least 1, got {p}"
            )));
        }
        let cp = c.powf(p);
        if cp > crate::assign::MAX_FINITE_COST {
            return Err(Error::param(format!(
                "GOSPA c^p must be at most {:e} so that costs stay finite, got c = {c}, p = {p} \
                 (c^p = {cp:e})",
                crate::assign::MAX_FINITE_COST
            )));
        }
        Ok(Self { c, p })
    }
}

/// The GOSPA distance between truths `X` and estimates `Y`, with its decomposition.
///
/// The three parts are `p`-th powers (metres^p) and add up to `distance^p`:
/// `distance^p = localisation + missed + false_tracks`.
#[derive(Debug, Clone, PartialEq)]
pub struct Gospa {
    /// The metric `d_p^(c,2)(X, Y)`, metres.
    pub distance: f64,
    /// `Σ_{(i,j) ∈ γ*} ‖x_i − y_j‖^p` over the optimal pairs, metres^p.
    pub localisation: f64,
    /// `(c^p / 2) · n_missed`, metres^p.
    pub missed: f64,
    /// `(c^p / 2) · n_false`, metres^p.
    pub false_tracks: f64,
    /// For each truth `i`, the estimate `j` it is paired with in `γ*`, or `None` if missed.
    pub assignment: Vec<Option<usize>>,
    /// Number of truths left unpaired (missed targets).
    pub n_missed: usize,
    /// Number of estimates left unpaired (false tracks).
    pub n_false: usize,
}

/// GOSPA metric with α = 2 and the 2-D Euclidean base distance.
///
/// # Definition
/// Rahmathullah, García-Fernández & Svensson, "Generalized optimal sub-pattern assignment
/// metric", *20th International Conference on Information Fusion* (FUSION), 2017 (cited from
/// memory). With α = 2,
///
/// ```text
/// d(X, Y) = [ min_γ  Σ_{(i,j) ∈ γ} ‖x_i − y_j‖^p  +  (c^p / 2) · (|X| + |Y| − 2|γ|) ]^(1/p),
/// ```
///
/// where `γ` ranges over partial assignments (sets of disjoint truth–estimate pairs). A pair at
/// distance `≥ c` never lowers the sum below leaving both points unpaired, so the optimal `γ*`
/// pairs only points closer than `c`. Units: positions in metres, `d` in metres.
///
/// # Computation
/// Equivalently `d^p = min_π Σ_i min(‖x_i − y_π(i)‖, c)^p + (c^p / 2) · ||Y| − |X||` over
/// complete assignments of the smaller set, since an assigned pair at distance `≥ c` costs
/// `c^p = c^p/2 + c^p/2`, exactly one missed target plus one false track. The assignment is
/// solved with [`crate::assign::solve_any`] on the cost `min(d, c)^p`; afterwards a pair is
/// kept in `γ*` iff `d < c` (at `d = c` both readings cost the same and the pair is dropped).
/// `‖·‖^p` is evaluated as `(Δx² + Δy²)^(p/2)`, so for `p = 2` no square root is taken.
///
/// # Errors
/// [`crate::ErrorKind::InvalidInput`] if a coordinate is not finite; the message names the
/// set, the point's index and its coordinates.
pub fn gospa(truth: &[[f64; 2]], estimates: &[[f64; 2]], params: &GospaParams) -> Result<Gospa> {
    check_points("truth", truth)?;
    check_points("estimate", estimates)?;
    let (n, m) = (truth.len(), estimates.len());
    let cp = params.c.powf(params.p);
    let half_p = params.p / 2.0;
    let dist_p = |x: &[f64; 2], y: &[f64; 2]| {
        let (dx, dy) = (x[0] - y[0], x[1] - y[1]);
        dx.mul_add(dx, dy * dy).powf(half_p)
    };

    let mut assignment = vec![None; n];
    let mut localisation = 0.0;
    if n > 0 && m > 0 {
        let data = truth
            .iter()
            .flat_map(|x| estimates.iter().map(move |y| (x, y)))
            .map(|(x, y)| dist_p(x, y).min(cp))
            .collect();
        let costs = CostMatrix::new(n, m, data)?;
        for (i, j) in solve_any(&costs)?.into_iter().enumerate() {
            if let Some(j) = j {
                let dp = dist_p(&truth[i], &estimates[j]);
                if dp < cp {
                    assignment[i] = Some(j);
                    localisation += dp;
                }
            }
        }
    }
    let paired = assignment.iter().flatten().count();
    let (n_missed, n_false) = (n - paired, m - paired);
    let missed = cp / 2.0 * n_missed as f64;
    let false_tracks = cp / 2.0 * n_false as f64;
    Ok(Gospa {
        distance: (localisation + missed + false_tracks).powf(params.p.recip()),
        localisation,
        missed,
        false_tracks,
        assignment,
        n_missed,
        n_false,
    })
}

/// Reject non-finite coordinates, naming the set (`what`) and the index.
fn check_points(what: &str, points: &[[f64; 2]]) -> Result<()> {
    match points
        .iter()
        .position(|p| !(p[0].is_finite() && p[1].is_finite()))
    {
        None => Ok(()),
        Some(i) => Err(Error::input(format!(
            "GOSPA {what} point {i} must have finite coordinates, got ({}, {})",
            points[i][0], points[i][1]
        ))),
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::error::ErrorKind;
    use proptest::prelude::*;
    use rand::{Rng, SeedableRng};
    use rand_chacha::ChaCha8Rng;

    fn params() -> GospaParams {
        GospaParams::new(10.0, 2.0).expect("valid")
    }

    /// Check against check-values.md §7 (p = 2, c = 10, α = 2; verified there by two
    /// brute-force implementations): each part and d to 1e-12, and the pairs exactly.
    #[allow(clippy::too_many_arguments)]
    fn check(
        x: &[[f64; 2]],
        y: &[[f64; 2]],
        pairs: &[Option<usize>],
        loc: f64,
        missed: f64,
        false_tracks: f64,
        d2: f64,
        d: f64,
    ) {
        let g = gospa(x, y, &params()).expect("valid input");
        let close = |a: f64, b: f64, what: &str| {
            assert!((a - b).abs() <= 1e-12, "{what}: got {a}, expected {b}");
        };
        assert_eq!(g.assignment, pairs);
        close(g.localisation, loc, "localisation");
        close(g.missed, missed, "missed");
        close(g.false_tracks, false_tracks, "false");
        close(g.localisation + g.missed + g.false_tracks, d2, "d^2");
        close(g.distance, d, "d");
    }

    const A: [[f64; 2]; 3] = [[0.0, 0.0], [5.0, 5.0], [-3.0, 8.0]];

    #[test]
    fn check_values_7a_no_truth() {
        check(&[], &A, &[], 0.0, 0.0, 150.0, 150.0, 12.247448713916);
        let g = gospa(&[], &A, &params()).expect("valid");
        assert_eq!((g.n_missed, g.n_false), (0, 3));
    }

    #[test]
    fn check_values_7a_prime_no_estimates() {
        check(
            &A,
            &[],
            &[None, None, None],
            0.0,
            150.0,
            0.0,
            150.0,
            12.247448713916,
        );
        let g = gospa(&A, &[], &params()).expect("valid");
        assert_eq!((g.n_missed, g.n_false), (3, 0));
    }

    #[test]
    fn check_values_7b_one_pair_one_far_estimate() {
        check(
            &[[0.0, 0.0], [10.0, 0.0]],
            &[[1.0, 0.0], [30.0, 30.0]],
            &[Some(0), None],
            1.0,
            50.0,
            50.0,
            101.0,
            10.049875621121,
        );
    }

    #[test]
    fn check_values_7c_pair_below_cutoff_is_kept() {
        // x1–y1 at 9 m (< c = 10) is kept.
        check(
            &[[0.0, 0.0], [10.0, 10.0], [50.0, 50.0]],
            &[[1.0, 1.0], [10.0, 19.0], [-40.0, 0.0]],
            &[Some(0), Some(1), None],
            83.0,
            50.0,
            50.0,
            183.0,
            13.527749258469,
        );
    }

    #[test]
    fn check_values_7d_not_greedy() {
        // Nearest-first pairing (x1–y0 at 1 m) is worse; the optimum pairs 3 m and 3 m.
        check(
            &[[0.0, 0.0], [4.0, 0.0]],
            &[[3.0, 0.0], [7.0, 0.0], [0.0, 9.5]],
            &[Some(0), Some(1)],
            18.0,
            0.0,
            50.0,
            68.0,
            8.246211251235,
        );
    }

    #[test]
    fn pair_at_exactly_the_cutoff_is_dropped() {
        // d = c: pairing or not both cost c^p; the definition keeps a pair only if d < c.
        let g = gospa(&[[0.0, 0.0]], &[[6.0, 8.0]], &params()).expect("valid");
        assert_eq!(g.assignment, vec![None]);
        assert_eq!((g.n_missed, g.n_false, g.localisation), (1, 1, 0.0));
        assert_eq!(g.distance, 10.0);
    }

    #[test]
    fn parameters_and_points_are_validated_with_messages() {
        let e = GospaParams::new(-1.0, 2.0).unwrap_err();
        assert_eq!(e.kind(), ErrorKind::InvalidParameter);
        assert_eq!(
            e.message(),
            "GOSPA cut-off c must be finite and greater than 0, got -1"
        );
        let e = GospaParams::new(10.0, 0.5).unwrap_err();
        assert_eq!(
            e.message(),
            "GOSPA order p must be finite and at least 1, got 0.5"
        );
        assert!(GospaParams::new(10.0, f64::NAN).is_err());
        assert!(GospaParams::new(f64::INFINITY, 2.0).is_err());
        assert!(GospaParams::new(1e100, 2.0).is_err());
        let e = gospa(&[[0.0, 0.0]], &[[1.0, f64::NAN]], &params()).unwrap_err();
        assert_eq!(e.kind(), ErrorKind::InvalidInput);
        assert_eq!(
            e.message(),
            "GOSPA estimate point 0 must have finite coordinates, got (1, NaN)"
        );
        let e = gospa(&[[0.0, 0.0], [f64::INFINITY, 0.0]], &[], &params()).unwrap_err();
        assert_eq!(
            e.message(),
            "GOSPA truth point 1 must have finite coordinates, got (inf, 0)"
        );
    }

    /// Brute force straight from the definition: the minimum over every partial assignment γ
    /// (any set of disjoint pairs, no cut-off applied in the enumeration) of
    /// `Σ_γ d^p + (c^p/2)(|X| + |Y| − 2|γ|)`.
    fn brute_force_dp(x: &[[f64; 2]], y: &[[f64; 2]], c: f64, p: f64) -> f64 {
        /// Every partial injection truth → estimate (`None` = truth unpaired).
        fn partial_injections(n: usize, m: usize) -> Vec<Vec<Option<usize>>> {
            let mut all = vec![Vec::new()];
            for _ in 0..n {
                all = all
                    .into_iter()
                    .flat_map(|prefix: Vec<Option<usize>>| {
                        let free: Vec<Option<usize>> = std::iter::once(None)
                            .chain((0..m).filter(|j| !prefix.contains(&Some(*j))).map(Some))
                            .collect();
                        free.into_iter().map(move |j| {
                            let mut next = prefix.clone();
                            next.push(j);
                            next
                        })
                    })
                    .collect();
            }
            all
        }
        partial_injections(x.len(), y.len())
            .iter()
            .map(|gamma| {
                let pairs = gamma.iter().flatten().count();
                let loc: f64 = gamma
                    .iter()
                    .enumerate()
                    .filter_map(|(i, j)| j.map(|j| (x[i][0] - y[j][0]).hypot(x[i][1] - y[j][1])))
                    .map(|d| d.powf(p))
                    .sum();
                loc + c.powf(p) / 2.0 * (x.len() + y.len() - 2 * pairs) as f64
            })
            .fold(f64::INFINITY, f64::min)
    }

    fn points(max: usize) -> impl Strategy<Value = Vec<[f64; 2]>> {
        proptest::collection::vec(
            (-20.0f64..20.0, -20.0f64..20.0).prop_map(|(a, b)| [a, b]),
            0..=max,
        )
    }

    proptest! {
        #[test]
        fn matches_brute_force_partial_assignment(
            x in points(5), y in points(5), c in 0.5f64..15.0, p in 1.0f64..4.0,
        ) {
            let params = GospaParams::new(c, p).expect("valid");
            let g = gospa(&x, &y, &params).expect("valid");
            let want = brute_force_dp(&x, &y, c, p);
            let got = g.localisation + g.missed + g.false_tracks;
            prop_assert!((got - want).abs() <= 1e-9 * want.max(1.0), "{got} vs {want}");
            prop_assert!((g.distance.powf(p) - got).abs() <= 1e-9 * got.max(1.0));
            // The reported pairs are consistent with the parts.
            let kept = g.assignment.iter().flatten().count();
            prop_assert_eq!(g.n_missed, x.len() - kept);
            prop_assert_eq!(g.n_false, y.len() - kept);
            for (i, j) in g.assignment.iter().enumerate() {
                if let Some(j) = *j {
                    prop_assert!((x[i][0] - y[j][0]).hypot(x[i][1] - y[j][1]) < c);
                }
            }
            // Symmetry of the metric: swapping the sets swaps missed and false.
            let h = gospa(&y, &x, &params).expect("valid");
            prop_assert!((h.distance - g.distance).abs() <= 1e-9 * g.distance.max(1.0));
            prop_assert_eq!((h.n_missed, h.n_false), (g.n_false, g.n_missed));
        }
    }

    #[test]
    fn metric_axioms_on_random_sets() {
        // GOSPA with α = 2 is a metric (Rahmathullah et al. 2017): identity and the triangle
        // inequality, checked on seeded random sets with a relative slack of 1e-12.
        let mut rng = ChaCha8Rng::seed_from_u64(0x6059a);
        let set = |rng: &mut ChaCha8Rng| -> Vec<[f64; 2]> {
            let n = rng.random_range(0..=6);
            (0..n)
                .map(|_| [rng.random_range(-30.0..30.0), rng.random_range(-30.0..30.0)])
                .collect()
        };
        for _ in 0..300 {
            let (a, b, c) = (set(&mut rng), set(&mut rng), set(&mut rng));
            let prm = GospaParams::new(rng.random_range(1.0..20.0), rng.random_range(1.0..3.0))
                .expect("valid");
            let d = |u: &[[f64; 2]], v: &[[f64; 2]]| gospa(u, v, &prm).expect("valid").distance;
            assert_eq!(d(&a, &a), 0.0);
            let (ab, bc, ac) = (d(&a, &b), d(&b, &c), d(&a, &c));
            assert!(
                ac <= (ab + bc) * (1.0 + 1e-12),
                "triangle: {ac} > {ab} + {bc}"
            );
        }
    }
}
