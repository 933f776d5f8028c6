//! Ranked assignments: the `k` cheapest complete assignments of a cost matrix, by Murty's
//! partitioning method on top of the shortest augmenting path [`Solver`].
//!
//! This module owns the hypothesis enumeration that JPDA needs on clusters too large for
//! exhaustive enumeration: rows are tracks, columns are the cluster's detections followed by
//! one "missed" column per track (finite only for that track), so every assignment is a joint
//! association event and the cheapest ones carry most of the probability.

use std::cmp::Ordering;
use std::collections::BinaryHeap;

use crate::assign::{Assignment, CostMatrix, Solver, check_shape, total_cost};
use crate::error::{ErrorKind, Result};

/// Marker for a free row in a stored matching (the solver's convention).
const NONE: usize = usize::MAX;

/// One cell of Murty's partition: a subset of assignments described by constraints, with its
/// cheapest member and the optimal duals that certify it.
#[derive(Debug)]
struct Node {
    /// Cost of `col4row` on the real rows, from the original matrix.
    cost: f64,
    /// Creation order; breaks cost ties so that the ranking is deterministic.
    seq: u64,
    /// Rows `0..fixed` are forced to their column in `col4row`.
    fixed: usize,
    /// Forbidden `(row, column)` pairs on rows `≥ fixed`.
    forbidden: Vec<(usize, usize)>,
    /// Best matching of the padded square problem in this cell (dummy rows included).
    col4row: Vec<usize>,
    /// Row duals of that matching.
    u: Vec<f64>,
    /// Column duals of that matching.
    v: Vec<f64>,
}

impl PartialEq for Node {
    fn eq(&self, other: &Self) -> bool {
        self.cmp(other) == Ordering::Equal
    }
}

impl Eq for Node {}

impl PartialOrd for Node {
    fn partial_cmp(&self, other: &Self) -> Option<Ordering> {
        Some(self.cmp(other))
    }
}

impl Ord for Node {
    /// Reversed, so that `BinaryHeap` (a max-heap) pops the cheapest, oldest node first.
    fn cmp(&self, other: &Self) -> Ordering {
        other
            .cost
            .total_cmp(&self.cost)
            .then_with(|| other.seq.cmp(&self.seq))
    }
}

/// The `k` cheapest complete assignments of `c`, in non-decreasing cost order.
///
/// # Problem
/// For an `n × m` cost matrix with `n ≤ m`, list injective `σ: rows → columns` avoiding every
/// forbidden (`+∞`) entry, ordered by `Σ_i C[i][σ(i)]`. Fewer than `k` are returned when fewer
/// feasible assignments exist (none when there is no feasible one, and none for `k = 0`). A
/// `0 × m` matrix has exactly one (empty) assignment, of cost 0.
///
/// # Method
/// Murty's partitioning (K. G. Murty, "An algorithm for ranking all the assignments in order of
/// increasing cost", *Operations Research* 16(3), 682–687, 1968; cited from memory). The best
/// assignment `a` of a cell is reported, and the rest of the cell is split into disjoint
/// subcells `t = fixed..n`: rows `< t` forced to `a`, pair `(t, a[t])` forbidden. A priority
/// queue holds each subcell with its best assignment; the cheapest is reported next.
///
/// Each subcell is solved with a single shortest augmenting path instead of from scratch, the
/// optimisation of Miller, Stone & Cox ("Optimizing Murty's ranked assignment method", *IEEE
/// Trans. Aerospace and Electronic Systems* 33(3), 1997; cited from memory): the parent's duals
/// stay feasible when entries only become forbidden, and its matching minus row `t` stays
/// tight, so augmenting from row `t` restores optimality. That argument needs a square problem
/// (in the rectangular LP a freed column must have zero dual, which the parent's duals do not
/// give), so the matrix is padded to `m × m` with zero-cost dummy rows. Dummy rows are never
/// partitioned on, so each real assignment appears once. Each subcell then costs one
/// augmentation, `O(m²)`, instead of a cold solve, `O(n² m)`; each reported assignment creates
/// at most `n` subcells. Memory: one `m × m` working matrix plus `O(m)` per queued subcell.
///
/// Forced rows are enforced by forbidding the rest of their row: an augmenting path that enters
/// a forced row's column reaches a dead end there, so the forced pair is never undone.
///
/// # Determinism
/// Equal costs are ranked by the order in which their cells were created, which is a fixed
/// function of the matrix (the ranking among ties is therefore reproducible, not lexicographic).
/// The reported `cost` is the entry sum in row order, so it is exactly what
/// [`crate::assign::solve`] would report for the same assignment.
///
/// # Errors
/// [`ErrorKind::InvalidInput`] if `rows > cols`.
pub fn k_best(c: &CostMatrix, k: usize) -> Result<Vec<Assignment>> {
    k_best_with(&mut Solver::new(), c, k)
}

/// [`k_best`] using (and growing) the buffers of an existing [`Solver`], for callers that rank
/// assignments every scan.
///
/// # Errors
/// As [`k_best`].
pub fn k_best_with(solver: &mut Solver, c: &CostMatrix, k: usize) -> Result<Vec<Assignment>> {
    let (n, m) = (c.rows(), c.cols());
    check_shape(n, m)?;
    if k == 0 {
        return Ok(Vec::new());
    }

    // Square padding: real rows first, then m − n dummy rows of zero cost.
    let mut padded = vec![0.0; m * m];
    padded[..n * m].copy_from_slice(c.as_slice());

    match solver.solve_slice(&padded, m, m) {
        Ok(()) => {}
        Err(e) if e.kind() == ErrorKind::Infeasible => return Ok(Vec::new()),
        Err(e) => return Err(e),
    }
    let mut seq = 0u64;
    let root_cols = solver.col_of_row().to_vec();
    let mut heap = BinaryHeap::new();
    heap.push(Node {
        cost: total_cost(c.as_slice(), m, &root_cols[..n]),
        seq,
        fixed: 0,
        forbidden: Vec::new(),
        col4row: root_cols,
        u: solver.row_duals().to_vec(),
        v: solver.col_duals().to_vec(),
    });

    let mut out = Vec::with_capacity(k.min(1024));
    let mut work = Vec::with_capacity(m * m);
    let mut warm = Vec::with_capacity(m);
    while let Some(node) = heap.pop() {
        out.push(Assignment {
            row_to_col: node.col4row[..n].to_vec(),
            cost: node.cost,
        });
        if out.len() == k {
            break;
        }

        // The node's constraints: its forbidden pairs, and rows < fixed restricted to their
        // column (everything else in the row forbidden).
        work.clear();
        work.extend_from_slice(&padded);
        for &(r, j) in &node.forbidden {
            work[r * m + j] = f64::INFINITY;
        }
        for r in 0..node.fixed {
            restrict_row(&mut work, m, r, node.col4row[r]);
        }

        for t in node.fixed..n {
            let at = node.col4row[t];
            let kept = work[t * m + at];
            work[t * m + at] = f64::INFINITY;

            warm.clear();
            warm.extend_from_slice(&node.col4row);
            warm[t] = NONE;
            solver.load_state(&node.u, &node.v, &warm);
            if solver.augment(&work, m, t) {
                let col4row = solver.col_of_row().to_vec();
                let forbidden = node
                    .forbidden
                    .iter()
                    .copied()
                    .filter(|&(r, _)| r >= t)
                    .chain(std::iter::once((t, at)))
                    .collect();
                seq += 1;
                heap.push(Node {
                    cost: total_cost(c.as_slice(), m, &col4row[..n]),
                    seq,
                    fixed: t,
                    forbidden,
                    col4row,
                    u: solver.row_duals().to_vec(),
                    v: solver.col_duals().to_vec(),
                });
            }

            // Later subcells force row t to its column instead.
            work[t * m + at] = kept;
            restrict_row(&mut work, m, t, at);
        }
    }
    Ok(out)
}

/// Forbid every entry of row `r` except column `keep` (row-major, `m` columns).
fn restrict_row(work: &mut [f64], m: usize, r: usize, keep: usize) {
    for (j, x) in work[r * m..(r + 1) * m].iter_mut().enumerate() {
        if j != keep {
            *x = f64::INFINITY;
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::assign::tests::{assert_valid, brute_force_all};
    use proptest::prelude::*;
    use rand::{Rng, SeedableRng};
    use rand_chacha::ChaCha8Rng;

    const INF: f64 = f64::INFINITY;

    fn m(rows: &[&[f64]]) -> CostMatrix {
        CostMatrix::from_rows(&rows.iter().map(|r| r.to_vec()).collect::<Vec<_>>())
            .expect("test matrix is valid")
    }

    fn costs(list: &[Assignment]) -> Vec<f64> {
        list.iter().map(|a| a.cost).collect()
    }

    /// Every listed assignment is valid, distinct from the others, and the costs never drop.
    fn assert_ranked(c: &CostMatrix, list: &[Assignment]) {
        for a in list {
            assert_valid(c, a);
        }
        for w in list.windows(2) {
            assert!(
                w[0].cost <= w[1].cost,
                "costs out of order: {} then {}",
                w[0].cost,
                w[1].cost
            );
        }
        let mut cols: Vec<&Vec<usize>> = list.iter().map(|a| &a.row_to_col).collect();
        cols.sort();
        cols.dedup();
        assert_eq!(cols.len(), list.len(), "an assignment was listed twice");
    }

    /// Brute-force ranking: all feasible assignments sorted by cost (stable, so equal costs
    /// keep lexicographic order).
    fn ranked_by_enumeration(c: &CostMatrix) -> Vec<Assignment> {
        let mut all = brute_force_all(c);
        all.sort_by(|a, b| a.cost.total_cmp(&b.cost));
        all
    }

    const C3: [[f64; 3]; 3] = [[1., 4., 6.], [3., 2., 7.5], [5., 9., 3.5]];
    const C4: [[f64; 4]; 4] = [
        [10., 5., 13., 15.],
        [3., 9., 18., 13.],
        [10., 7., 2., 2.5],
        [7., 11., 9., 7.],
    ];

    #[test]
    fn check_values_6_three_by_three_all_six_in_order() {
        // check-values.md §6 (Murty 1968, from memory; verified there by enumeration).
        let c = m(&C3.iter().map(|r| r.as_slice()).collect::<Vec<_>>());
        let got = k_best(&c, 6).expect("valid");
        let want: [(&[usize], f64); 6] = [
            (&[0, 1, 2], 6.5),
            (&[1, 0, 2], 10.5),
            (&[2, 1, 0], 13.0),
            (&[1, 2, 0], 16.5),
            (&[0, 2, 1], 17.5),
            (&[2, 0, 1], 18.0),
        ];
        assert_eq!(got.len(), 6);
        for (a, (cols, cost)) in got.iter().zip(want) {
            assert_eq!((a.row_to_col.as_slice(), a.cost), (cols, cost));
        }
        // k larger than the number of permutations returns all of them.
        assert_eq!(k_best(&c, 50).expect("valid"), got);
    }

    #[test]
    fn check_values_6_four_by_four_full_ranking() {
        // check-values.md §6: the five best with their columns, the 6th, then all 24 costs.
        let c = m(&C4.iter().map(|r| r.as_slice()).collect::<Vec<_>>());
        let got = k_best(&c, 100).expect("valid");
        assert_eq!(got.len(), 24, "k > 24 returns all 24 permutations");
        assert_ranked(&c, &got);
        let top: [(&[usize], f64); 6] = [
            (&[1, 0, 2, 3], 17.0),
            (&[1, 0, 3, 2], 19.5),
            (&[1, 3, 2, 0], 27.0),
            (&[0, 1, 2, 3], 28.0),
            (&[2, 0, 3, 1], 29.5),
            (&[2, 0, 1, 3], 30.0),
        ];
        for (a, (cols, cost)) in got.iter().zip(top) {
            assert_eq!((a.row_to_col.as_slice(), a.cost), (cols, cost));
        }
        let all = [
            17.0, 19.5, 27.0, 28.0, 29.5, 30.0, 30.5, 31.0, 31.5, 32.5, 33.0, 34.0, 36.0, 37.0,
            39.0, 39.0, 40.0, 40.0, 41.5, 42.0, 43.0, 47.0, 47.0, 54.0,
        ];
        assert_eq!(costs(&got), all);
        // A shorter request is a prefix of the full ranking.
        assert_eq!(k_best(&c, 7).expect("valid"), got[..7]);
    }

    #[test]
    fn check_values_5_second_best_totals() {
        // check-values.md §5 gives the second-best total of each case; rank 2 must match it,
        // including the rectangular and the forbidden-entry case.
        let cases: [(CostMatrix, f64, f64); 4] = [
            (
                m(&[
                    &[2., 8., 2., 5.],
                    &[8., 3., 4., 3.],
                    &[7., 3., 9., 5.],
                    &[5., 5., 6., 5.],
                ]),
                13.0,
                14.0,
            ),
            (
                m(&[
                    &[5., 14., 2., 5., 7.],
                    &[7., 19., 16., 19., 20.],
                    &[2., 3., 18., 2., 4.],
                    &[4., 19., 8., 6., 4.],
                    &[10., 12., 17., 13., 20.],
                ]),
                27.0,
                29.0,
            ),
            (
                m(&[
                    &[6., 7., 7., 4., 9.],
                    &[1., 3., 2., 1., 9.],
                    &[1., 5., 8., 7., 8.],
                ]),
                7.0,
                8.0,
            ),
            (
                m(&[
                    &[1., INF, 3., INF],
                    &[INF, 2., INF, 1.],
                    &[2., 1., INF, INF],
                    &[INF, 4., 2., 3.],
                ]),
                5.0,
                10.0,
            ),
        ];
        for (c, best, second) in &cases {
            let got = k_best(c, 2).expect("valid");
            assert_eq!(costs(&got), [*best, *second]);
            assert_ranked(c, &got);
        }
    }

    #[test]
    fn jpda_form_tracks_by_detections_plus_missed_columns() {
        // Invented cluster: 3 tracks, 4 detections. Columns 0..4 are detections, column 4 + t
        // is "track t missed" (finite only for track t). Costs are negative log-likelihood
        // ratios (dimensionless); +inf marks a detection outside a track's gate.
        let c = m(&[
            &[1.2, 2.5, INF, INF, 3.0, INF, INF],
            &[2.0, 0.7, 1.9, INF, INF, 2.6, INF],
            &[INF, INF, 0.9, 1.4, INF, INF, 2.2],
        ]);
        // Reference: the joint association events enumerated from the JPDA definition (each
        // track takes one gated detection or is missed; no detection is shared), written
        // independently of the cost-matrix encoding.
        let gates: [&[(usize, f64)]; 3] = [
            &[(0, 1.2), (1, 2.5)],
            &[(0, 2.0), (1, 0.7), (2, 1.9)],
            &[(2, 0.9), (3, 1.4)],
        ];
        let missed = [3.0, 2.6, 2.2];
        let mut events: Vec<(f64, Vec<usize>)> = Vec::new();
        for e0 in gates[0]
            .iter()
            .map(|&(d, x)| (Some(d), x))
            .chain([(None, missed[0])])
        {
            for e1 in gates[1]
                .iter()
                .map(|&(d, x)| (Some(d), x))
                .chain([(None, missed[1])])
            {
                for e2 in gates[2]
                    .iter()
                    .map(|&(d, x)| (Some(d), x))
                    .chain([(None, missed[2])])
                {
                    let picks = [e0.0, e1.0, e2.0];
                    let dets: Vec<usize> = picks.iter().flatten().copied().collect();
                    let mut uniq = dets.clone();
                    uniq.sort();
                    uniq.dedup();
                    if uniq.len() != dets.len() {
                        continue;
                    }
                    let cols = picks
                        .iter()
                        .enumerate()
                        .map(|(t, p)| p.unwrap_or(4 + t))
                        .collect();
                    events.push((e0.1 + e1.1 + e2.1, cols));
                }
            }
        }
        events.sort_by(|a, b| a.0.total_cmp(&b.0).then_with(|| a.1.cmp(&b.1)));

        let got = k_best(&c, 1000).expect("valid");
        assert_ranked(&c, &got);
        assert_eq!(got.len(), events.len(), "every joint event is listed once");
        let mut ours: Vec<(f64, Vec<usize>)> =
            got.iter().map(|a| (a.cost, a.row_to_col.clone())).collect();
        assert_eq!(costs(&got), events.iter().map(|e| e.0).collect::<Vec<_>>());
        ours.sort_by(|a, b| a.0.total_cmp(&b.0).then_with(|| a.1.cmp(&b.1)));
        assert_eq!(ours, events);
        // The best event: track 0 on detection 0, track 1 on 1, track 2 on 2.
        assert_eq!(got[0].row_to_col, vec![0, 1, 2]);
    }

    #[test]
    fn jpda_form_random_clusters_match_enumeration() {
        // Seeded random clusters in the JPDA form (tracks × detections + one missed column per
        // track); the 40 best must match brute-force enumeration.
        let mut rng = ChaCha8Rng::seed_from_u64(0x0a55_0c1a);
        let mut solver = Solver::new();
        for _ in 0..25 {
            let tracks = rng.random_range(1..=5);
            let dets = rng.random_range(0..=6);
            let cols = dets + tracks;
            let mut data = vec![INF; tracks * cols];
            for t in 0..tracks {
                for d in 0..dets {
                    if rng.random_bool(0.6) {
                        data[t * cols + d] = f64::from(rng.random_range(0..64)) / 8.0;
                    }
                }
                data[t * cols + dets + t] = f64::from(rng.random_range(8..40)) / 8.0;
            }
            let c = CostMatrix::new(tracks, cols, data).expect("valid");
            let got = k_best_with(&mut solver, &c, 40).expect("valid");
            assert_ranked(&c, &got);
            let want = ranked_by_enumeration(&c);
            let n = want.len().min(40);
            assert_eq!(costs(&got), costs(&want[..n]));
        }
    }

    #[test]
    fn edge_cases() {
        let c = m(&[&[1., 2.], &[3., 4.]]);
        assert!(k_best(&c, 0).expect("valid").is_empty());
        // No feasible assignment: an empty ranking, not an error.
        let c = m(&[&[1., INF], &[2., INF]]);
        assert!(k_best(&c, 3).expect("valid").is_empty());
        // Zero rows: one empty assignment.
        let c = CostMatrix::new(0, 2, vec![]).expect("valid");
        assert_eq!(
            k_best(&c, 3).expect("valid"),
            vec![Assignment {
                row_to_col: vec![],
                cost: 0.0
            }]
        );
        // More rows than columns is an input error naming the shape.
        let e = k_best(&m(&[&[1.], &[2.]]), 2).unwrap_err();
        assert_eq!(e.kind(), ErrorKind::InvalidInput);
        assert!(e.message().contains("2×1"), "{e}");
    }

    #[test]
    fn ties_rank_the_same_way_every_time() {
        let c = CostMatrix::new(3, 4, vec![1.0; 12]).expect("valid");
        let a = k_best(&c, 24).expect("valid");
        assert_eq!(a.len(), 24);
        assert!(a.iter().all(|x| x.cost == 3.0));
        assert_ranked(&c, &a);
        assert_eq!(k_best(&c, 24).expect("valid"), a);
    }

    /// Random rows ≤ cols ≤ 6 matrices, small integer costs (ties) and ~20 % forbidden entries.
    fn case() -> impl Strategy<Value = (CostMatrix, usize)> {
        (1usize..=5)
            .prop_flat_map(|r| (Just(r), r..=6))
            .prop_flat_map(|(r, c)| {
                let cell = prop_oneof![4 => (0i32..6).prop_map(f64::from), 1 => Just(INF)];
                (
                    Just(r),
                    Just(c),
                    proptest::collection::vec(cell, r * c),
                    1usize..=30,
                )
            })
            .prop_map(|(r, c, data, k)| (CostMatrix::new(r, c, data).expect("valid"), k))
    }

    proptest! {
        #[test]
        fn ranking_matches_enumeration((c, k) in case()) {
            let got = k_best(&c, k).expect("valid");
            assert_ranked(&c, &got);
            let want = ranked_by_enumeration(&c);
            let n = want.len().min(k);
            prop_assert_eq!(got.len(), n);
            prop_assert_eq!(costs(&got), costs(&want[..n]));
        }
    }
}
