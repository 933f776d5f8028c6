//! Association inside one cluster of tracks that share gated detections: global nearest
//! neighbour by optimal assignment, and joint probabilistic data association by exact
//! enumeration of the joint hypotheses or, for large clusters, the k best joint hypotheses by
//! Murty's method.
//!
//! Both use the same per-pair weights of the clutter measurement model, with the track's
//! existence probability r folded in (joint integrated PDA, Mušicki & Evans, IEEE TAES 40(3),
//! 2004): track t missed weighs 1 − r_t P_D P_G, track t taking detection j weighs
//! r_t P_D N(ν_tj; 0, S_t) / κ_j, with κ_j = λ̄_c f_c(z_j) the clutter intensity. A joint
//! hypothesis assigns each track "missed" or one detection, no detection to two tracks; its
//! weight is the product of its pairs' weights (detections left over are clutter or births,
//! whose factor κ_j is common to all hypotheses and cancels).

use crate::assign::{CostMatrix, Solver};
use crate::murty;

/// One track's candidates inside a cluster: its missed weight and (local detection, weight)
/// options, weights already scaled so that the largest is 1 (a per-track constant cancels).
#[derive(Debug, Clone, Default)]
pub(crate) struct Candidates {
    pub(crate) missed: f64,
    pub(crate) options: Vec<(u32, f64)>,
}

/// Marginal association probabilities of one track: missed first, then aligned with options.
#[derive(Debug, Clone, Default)]
pub(crate) struct Marginals {
    pub(crate) missed: f64,
    pub(crate) options: Vec<f64>,
}

/// What association of one cluster produced.
#[derive(Debug, Clone, Default)]
pub(crate) struct ClusterOutcome {
    pub(crate) marginals: Vec<Marginals>,
    /// Joint hypotheses evaluated.
    pub(crate) hypotheses: usize,
    /// Whether the hypothesis set was truncated to the k best.
    pub(crate) truncated: bool,
}

/// Association method, resolved from the configuration.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub(crate) enum Method {
    Gnn,
    Jpda { max_exact: usize, k_best: usize },
}

/// Count joint hypotheses up to `cap` (returns cap + 1 when there are more).
fn count_hypotheses(c: &[Candidates], n_dets: usize, cap: usize) -> usize {
    fn rec(c: &[Candidates], t: usize, used: &mut [bool], count: &mut usize, cap: usize) {
        if *count > cap {
            return;
        }
        if t == c.len() {
            *count += 1;
            return;
        }
        rec(c, t + 1, used, count, cap);
        for &(j, _) in &c[t].options {
            if !used[j as usize] {
                used[j as usize] = true;
                rec(c, t + 1, used, count, cap);
                used[j as usize] = false;
            }
        }
    }
    let mut used = vec![false; n_dets];
    let mut count = 0;
    rec(c, 0, &mut used, &mut count, cap);
    count
}

/// Exact JPDA marginals by depth-first enumeration of every joint hypothesis.
fn exact_marginals(c: &[Candidates], n_dets: usize) -> (Vec<Marginals>, usize) {
    struct Ctx<'a> {
        c: &'a [Candidates],
        used: Vec<bool>,
        choice: Vec<usize>, // 0 = missed, k + 1 = option k
        acc: Vec<Marginals>,
        total: f64,
        count: usize,
    }
    fn rec(ctx: &mut Ctx<'_>, t: usize, w: f64) {
        if t == ctx.c.len() {
            ctx.total += w;
            ctx.count += 1;
            for (ti, &ch) in ctx.choice.iter().enumerate() {
                if ch == 0 {
                    ctx.acc[ti].missed += w;
                } else {
                    ctx.acc[ti].options[ch - 1] += w;
                }
            }
            return;
        }
        ctx.choice[t] = 0;
        let wm = ctx.c[t].missed;
        rec(ctx, t + 1, w * wm);
        for k in 0..ctx.c[t].options.len() {
            let (j, wj) = ctx.c[t].options[k];
            if !ctx.used[j as usize] {
                ctx.used[j as usize] = true;
                ctx.choice[t] = k + 1;
                rec(ctx, t + 1, w * wj);
                ctx.used[j as usize] = false;
            }
        }
    }
    let mut ctx = Ctx {
        c,
        used: vec![false; n_dets],
        choice: vec![0; c.len()],
        acc: c
            .iter()
            .map(|t| Marginals {
                missed: 0.0,
                options: vec![0.0; t.options.len()],
            })
            .collect(),
        total: 0.0,
        count: 0,
    };
    rec(&mut ctx, 0, 1.0);
    normalise(&mut ctx.acc, ctx.total);
    (ctx.acc, ctx.count)
}

fn normalise(m: &mut [Marginals], total: f64) {
    if total > 0.0 {
        for t in m {
            t.missed /= total;
            for o in &mut t.options {
                *o /= total;
            }
        }
    } else {
        for t in m {
            t.missed = 1.0;
            t.options.iter_mut().for_each(|o| *o = 0.0);
        }
    }
}

/// The cost matrix of the cluster: rows = tracks, columns = detections then one "missed"
/// column per track; cost = −ln weight, forbidden pairs ∞.
fn cost_matrix(c: &[Candidates], n_dets: usize) -> CostMatrix {
    let rows = c.len();
    let cols = n_dets + rows;
    let mut data = vec![f64::INFINITY; rows * cols];
    for (t, cand) in c.iter().enumerate() {
        for &(j, w) in &cand.options {
            data[t * cols + j as usize] = -w.ln();
        }
        data[t * cols + n_dets + t] = -cand.missed.ln();
    }
    // Every row has a finite missed entry, so the matrix is valid and the problem feasible.
    CostMatrix::new(rows, cols, data).unwrap_or_else(|_| unreachable_cost_matrix(rows, cols))
}

#[cold]
fn unreachable_cost_matrix(rows: usize, cols: usize) -> CostMatrix {
    // Weights are positive and finite by construction; fall back to all-missed costs.
    let mut data = vec![f64::INFINITY; rows * cols];
    for t in 0..rows {
        data[t * cols + (cols - rows) + t] = 0.0;
    }
    CostMatrix::new(rows, cols, data).expect("all-missed cost matrix is valid")
}

/// Clusters with more tracks than this are not solved by Murty's method (whose k best
/// hypotheses say little about a cluster with astronomically many) but by the linear
/// multi-target approximation [`linear_multitarget`].
pub(crate) const MURTY_MAX_TRACKS: usize = 32;

/// Linear multi-target approximation for very large clusters, in the spirit of LM-IPDA
/// (Mušicki & La Scala, IEEE TAES 44(3), 2008): each track is associated on its own, with the
/// other tracks of the cluster treated as additional clutter. In the scaled weights used here
/// track σ contributes intensity w_σj / Σ_k w_σk · (1 − w_σ0 / Σ_k w_σk) at detection j (its
/// probability of having produced j), which is added to the clutter term 1 of that detection:
/// β_tj ∝ w_tj / (1 + Σ_{σ≠t} π_σj), β_t0 ∝ w_t0. Cost is linear in the number of pairs.
pub(crate) fn linear_multitarget(c: &[Candidates], n_dets: usize) -> Vec<Marginals> {
    // π_σj: each track's own single-target probability of detection j.
    let mut total = vec![0.0f64; n_dets];
    let own: Vec<Vec<f64>> = c
        .iter()
        .map(|t| {
            let norm = t.missed + t.options.iter().map(|o| o.1).sum::<f64>();
            t.options.iter().map(|o| o.1 / norm).collect()
        })
        .collect();
    for (t, p) in c.iter().zip(&own) {
        for (o, pj) in t.options.iter().zip(p) {
            total[o.0 as usize] += pj;
        }
    }
    c.iter()
        .zip(&own)
        .map(|(t, p)| {
            let opts: Vec<f64> = t
                .options
                .iter()
                .zip(p)
                .map(|(o, pj)| o.1 / (1.0 + (total[o.0 as usize] - pj).max(0.0)))
                .collect();
            let norm = t.missed + opts.iter().sum::<f64>();
            Marginals {
                missed: t.missed / norm,
                options: opts.iter().map(|o| o / norm).collect(),
            }
        })
        .collect()
}

/// Marginals of a track alone in its cluster, in place: `weights` holds the weights of its
/// options on entry (any common scale, like `missed`) and their marginals on return; the
/// missed marginal is returned. JPDA normalises (the hypotheses are the track's own: missed or
/// one option); GNN takes the heaviest option if it outweighs "missed" (ties: the first).
pub(crate) fn lone_in_place(missed: f64, weights: &mut [f64], method: Method) -> f64 {
    match method {
        Method::Jpda { .. } => {
            let norm = missed + weights.iter().sum::<f64>();
            weights.iter_mut().for_each(|w| *w /= norm);
            missed / norm
        }
        Method::Gnn => {
            let best = weights
                .iter()
                .enumerate()
                .filter(|(_, w)| **w > missed)
                .max_by(|a, b| a.1.total_cmp(b.1).then(b.0.cmp(&a.0)))
                .map(|(k, _)| k);
            weights.iter_mut().for_each(|w| *w = 0.0);
            match best {
                Some(k) => {
                    weights[k] = 1.0;
                    0.0
                }
                None => 1.0,
            }
        }
    }
}

/// Associate one cluster of `c.len()` tracks and `n_dets` detections.
pub(crate) fn associate(
    c: &[Candidates],
    n_dets: usize,
    method: Method,
    solver: &mut Solver,
) -> ClusterOutcome {
    // A lone track (the common case) needs no joint reasoning: its hypotheses are its own.
    if let [t] = c {
        let mut options: Vec<f64> = t.options.iter().map(|o| o.1).collect();
        let missed = lone_in_place(t.missed, &mut options, method);
        return ClusterOutcome {
            marginals: vec![Marginals { missed, options }],
            hypotheses: t.options.len() + 1,
            truncated: false,
        };
    }
    match method {
        Method::Gnn => {
            let cm = cost_matrix(c, n_dets);
            let mut marginals: Vec<Marginals> = c
                .iter()
                .map(|t| Marginals {
                    missed: 1.0,
                    options: vec![0.0; t.options.len()],
                })
                .collect();
            if let Ok(a) = solver.solve(&cm) {
                for (t, &col) in a.row_to_col.iter().enumerate() {
                    if col < n_dets {
                        if let Some(k) = c[t].options.iter().position(|o| o.0 as usize == col) {
                            marginals[t].missed = 0.0;
                            marginals[t].options[k] = 1.0;
                        }
                    }
                }
            }
            ClusterOutcome {
                marginals,
                hypotheses: 1,
                truncated: false,
            }
        }
        Method::Jpda { max_exact, k_best } => {
            let count = count_hypotheses(c, n_dets, max_exact);
            if count <= max_exact {
                let (marginals, hypotheses) = exact_marginals(c, n_dets);
                return ClusterOutcome {
                    marginals,
                    hypotheses,
                    truncated: false,
                };
            }
            if c.len() > MURTY_MAX_TRACKS {
                return ClusterOutcome {
                    marginals: linear_multitarget(c, n_dets),
                    hypotheses: 0,
                    truncated: true,
                };
            }
            let cm = cost_matrix(c, n_dets);
            let hyps = murty::k_best_with(solver, &cm, k_best).unwrap_or_default();
            let mut acc: Vec<Marginals> = c
                .iter()
                .map(|t| Marginals {
                    missed: 0.0,
                    options: vec![0.0; t.options.len()],
                })
                .collect();
            let best = hyps.first().map(|h| h.cost).unwrap_or(0.0);
            let mut total = 0.0;
            for h in &hyps {
                let w = (best - h.cost).exp();
                total += w;
                for (t, &col) in h.row_to_col.iter().enumerate() {
                    if col < n_dets {
                        if let Some(k) = c[t].options.iter().position(|o| o.0 as usize == col) {
                            acc[t].options[k] += w;
                        }
                    } else {
                        acc[t].missed += w;
                    }
                }
            }
            normalise(&mut acc, total);
            ClusterOutcome {
                marginals: acc,
                hypotheses: hyps.len(),
                truncated: true,
            }
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn two_tracks() -> Vec<Candidates> {
        vec![
            Candidates {
                missed: 0.1,
                options: vec![(0, 1.0), (1, 0.4)],
            },
            Candidates {
                missed: 0.2,
                options: vec![(0, 0.5), (1, 1.0), (2, 0.3)],
            },
        ]
    }

    // Brute force written from the definition: enumerate every assignment of {missed, det} to
    // each track with distinct detections, multiply, normalise.
    fn brute(c: &[Candidates], n: usize) -> Vec<Marginals> {
        let mut acc: Vec<Marginals> = c
            .iter()
            .map(|t| Marginals {
                missed: 0.0,
                options: vec![0.0; t.options.len()],
            })
            .collect();
        let mut total = 0.0;
        let sizes: Vec<usize> = c.iter().map(|t| t.options.len() + 1).collect();
        let mut idx = vec![0usize; c.len()];
        loop {
            let mut used = vec![false; n];
            let mut ok = true;
            let mut w = 1.0;
            for (t, &k) in idx.iter().enumerate() {
                if k == 0 {
                    w *= c[t].missed;
                } else {
                    let (j, wj) = c[t].options[k - 1];
                    if used[j as usize] {
                        ok = false;
                    }
                    used[j as usize] = true;
                    w *= wj;
                }
            }
            if ok {
                total += w;
                for (t, &k) in idx.iter().enumerate() {
                    if k == 0 {
                        acc[t].missed += w
                    } else {
                        acc[t].options[k - 1] += w
                    }
                }
            }
            let mut p = 0;
            loop {
                if p == idx.len() {
                    normalise(&mut acc, total);
                    return acc;
                }
                idx[p] += 1;
                if idx[p] < sizes[p] {
                    break;
                }
                idx[p] = 0;
                p += 1;
            }
        }
    }

    #[test]
    fn exact_jpda_equals_brute_force_and_sums_to_one() {
        let c = two_tracks();
        let (m, count) = exact_marginals(&c, 3);
        // hypotheses: (miss|0|1) × (miss|0|1|2) minus the two collisions = 12 − 2 = 10
        assert_eq!(count, 10);
        let b = brute(&c, 3);
        for (x, y) in m.iter().zip(&b) {
            assert!((x.missed - y.missed).abs() < 1e-15);
            for (a, bb) in x.options.iter().zip(&y.options) {
                assert!((a - bb).abs() < 1e-15);
            }
            let s: f64 = x.missed + x.options.iter().sum::<f64>();
            assert!((s - 1.0).abs() < 1e-12);
        }
    }

    #[test]
    fn murty_truncation_approaches_exact_marginals() {
        let c = two_tracks();
        let mut solver = Solver::new();
        let exact = associate(
            &c,
            3,
            Method::Jpda {
                max_exact: 1000,
                k_best: 10,
            },
            &mut solver,
        );
        assert!(!exact.truncated);
        // Force the k-best path with all 10 hypotheses: identical marginals.
        let kb = associate(
            &c,
            3,
            Method::Jpda {
                max_exact: 1,
                k_best: 10,
            },
            &mut solver,
        );
        assert!(kb.truncated && kb.hypotheses == 10);
        for (x, y) in exact.marginals.iter().zip(&kb.marginals) {
            assert!((x.missed - y.missed).abs() < 1e-12);
        }
        let gnn = associate(&c, 3, Method::Gnn, &mut solver);
        // best joint: t0→0 (1.0) & t1→1 (1.0)
        assert_eq!(gnn.marginals[0].options, vec![1.0, 0.0]);
        assert_eq!(gnn.marginals[1].options, vec![0.0, 1.0, 0.0]);
    }
}
