//! Optimal two-dimensional assignment: [`CostMatrix`], [`Assignment`] and the reusable
//! shortest-augmenting-path [`Solver`].
//!
//! This module owns the linear assignment problem that every association step reduces to:
//! given an `n × m` cost matrix with `n ≤ m`, give each row its own column so that the total
//! cost is smallest. An entry of `f64::INFINITY` marks a forbidden pair (for instance a
//! detection outside a track's gate). The method is the shortest augmenting path algorithm of
//! Jonker and Volgenant in the rectangular form described by Crouse; [`Solver`] keeps its scratch
//! buffers between calls because the tracker solves many small problems every scan.

use crate::error::{Error, ErrorKind, Result};

/// Largest magnitude accepted for a finite cost entry.
///
/// The solver adds and subtracts costs and dual variables; keeping every finite entry within
/// `±1e150` means that no intermediate sum of a problem with fewer than `1e100` rows can overflow
/// to infinity and be mistaken for a forbidden pair. Costs are dimensionless here (the caller's
/// unit, e.g. a negative log-likelihood).
pub const MAX_FINITE_COST: f64 = 1e150;

/// Marker for "no row" / "no column" in the solver's index vectors.
const NONE: usize = usize::MAX;

/// A dense, row-major `rows × cols` matrix of assignment costs.
///
/// Entry `(r, c)` is the cost of giving column `c` to row `r`. Every entry is either a finite
/// number with `|x| ≤` [`MAX_FINITE_COST`] or `f64::INFINITY`, which means the pair is
/// forbidden. `NaN` and `-∞` are rejected by every constructor and by [`CostMatrix::set`].
#[derive(Debug, Clone, PartialEq)]
pub struct CostMatrix {
    rows: usize,
    cols: usize,
    data: Vec<f64>,
}

/// Check one entry at `(r, c)`; the message names the entry.
fn check_entry(value: f64, r: usize, c: usize) -> Result<f64> {
    if value == f64::INFINITY || (value.is_finite() && value.abs() <= MAX_FINITE_COST) {
        Ok(value)
    } else {
        Err(Error::input(format!(
            "cost matrix entry ({r}, {c}) must be finite with magnitude at most \
             {MAX_FINITE_COST:e}, or +inf for a forbidden pair; got {value}"
        )))
    }
}

impl CostMatrix {
    /// A `rows × cols` matrix from row-major `data`.
    ///
    /// # Errors
    /// [`ErrorKind::InvalidInput`] if `data.len() != rows * cols`, or if an entry is `NaN`,
    /// `-∞`, or finite with magnitude above [`MAX_FINITE_COST`]. The message names the entry.
    pub fn new(rows: usize, cols: usize, data: Vec<f64>) -> Result<Self> {
        let expected = rows.checked_mul(cols).ok_or_else(|| {
            Error::input(format!(
                "cost matrix shape {rows}×{cols} has more entries than fit in memory"
            ))
        })?;
        if data.len() != expected {
            return Err(Error::input(format!(
                "cost matrix data must have rows × cols = {rows}×{cols} = {expected} entries, \
                 got {}",
                data.len()
            )));
        }
        for (k, &x) in data.iter().enumerate() {
            check_entry(x, k / cols, k % cols)?;
        }
        Ok(Self { rows, cols, data })
    }

    /// A matrix from a slice of equally long rows. An empty slice gives a `0 × 0` matrix.
    ///
    /// # Errors
    /// [`ErrorKind::InvalidInput`] if the rows differ in length (the message names the first
    /// row whose length differs from row 0) or an entry is invalid as in [`CostMatrix::new`].
    pub fn from_rows(rows: &[Vec<f64>]) -> Result<Self> {
        let cols = rows.first().map_or(0, Vec::len);
        let mut data = Vec::with_capacity(rows.len() * cols);
        for (r, row) in rows.iter().enumerate() {
            if row.len() != cols {
                return Err(Error::input(format!(
                    "cost matrix rows must all have the same length: row 0 has {cols} entries, \
                     row {r} has {}",
                    row.len()
                )));
            }
            data.extend_from_slice(row);
        }
        Self::new(rows.len(), cols, data)
    }

    /// Number of rows (e.g. tracks).
    pub fn rows(&self) -> usize {
        self.rows
    }

    /// Number of columns (e.g. detections).
    pub fn cols(&self) -> usize {
        self.cols
    }

    /// Entry `(r, c)`; `f64::INFINITY` means the pair is forbidden.
    ///
    /// # Panics
    /// If `r ≥ rows()` or `c ≥ cols()` (an indexing bug in the caller, as with slices).
    pub fn get(&self, r: usize, c: usize) -> f64 {
        assert!(
            r < self.rows && c < self.cols,
            "cost matrix index ({r}, {c}) out of range for a {}×{} matrix",
            self.rows,
            self.cols
        );
        self.data[r * self.cols + c]
    }

    /// Set entry `(r, c)` to `value` (`f64::INFINITY` forbids the pair).
    ///
    /// # Errors
    /// [`ErrorKind::InvalidInput`] if the index is out of range or `value` is invalid as in
    /// [`CostMatrix::new`]; the matrix is then left unchanged.
    pub fn set(&mut self, r: usize, c: usize, value: f64) -> Result<()> {
        if r >= self.rows || c >= self.cols {
            return Err(Error::input(format!(
                "cost matrix index ({r}, {c}) out of range for a {}×{} matrix",
                self.rows, self.cols
            )));
        }
        self.data[r * self.cols + c] = check_entry(value, r, c)?;
        Ok(())
    }

    /// The row-major entries.
    pub fn as_slice(&self) -> &[f64] {
        &self.data
    }

    /// The `cols × rows` transpose.
    pub fn transpose(&self) -> CostMatrix {
        let mut data = Vec::with_capacity(self.data.len());
        transpose_into(&self.data, self.rows, self.cols, &mut data);
        CostMatrix {
            rows: self.cols,
            cols: self.rows,
            data,
        }
    }
}

/// Write the transpose of the row-major `rows × cols` `src` into `dst` (cleared first).
fn transpose_into(src: &[f64], rows: usize, cols: usize, dst: &mut Vec<f64>) {
    dst.clear();
    for c in 0..cols {
        dst.extend((0..rows).map(|r| src[r * cols + c]));
    }
}

/// A complete assignment of rows to distinct columns.
#[derive(Debug, Clone, PartialEq)]
pub struct Assignment {
    /// `row_to_col[r]` is the column given to row `r`; all columns are distinct. Every row is
    /// assigned (the solvers require `rows ≤ cols`).
    pub row_to_col: Vec<usize>,
    /// The total `Σ_r c[r][row_to_col[r]]`, summed in row order from the original entries.
    pub cost: f64,
}

/// Minimum-cost assignment by the shortest augmenting path method, with reusable buffers.
///
/// # Problem
/// For an `n × m` cost matrix `C` with `n ≤ m`, find an injective `σ: {0..n} → {0..m}` that
/// minimises `Σ_i C[i][σ(i)]`, using no forbidden (`+∞`) entry. The linear-programming dual is
///
/// ```text
/// maximise Σ_i u_i + Σ_j v_j   subject to   u_i + v_j ≤ C[i][j],   v_j ≤ 0,
/// ```
///
/// and `σ` is optimal iff duals exist with `u_i + v_σ(i) = C[i][σ(i)]` and `v_j = 0` for every
/// unassigned column (complementary slackness).
///
/// # Method
/// Rows are added one at a time. For each new row a Dijkstra search over the reduced costs
/// `C[i][j] − u_i − v_j ≥ 0` finds the cheapest alternating path to a free column; the duals are
/// updated so that they stay feasible and tight on the matching, and the path is flipped. This
/// is the augmentation phase of Jonker & Volgenant, "A shortest augmenting path algorithm for
/// dense and sparse linear assignment problems", *Computing* 38, 325–340 (1987), in the
/// rectangular form of D. F. Crouse, "On implementing 2D rectangular assignment algorithms",
/// *IEEE Trans. Aerospace and Electronic Systems* 52(4), 1679–1696 (2016). JV's initialisation
/// heuristics (column reduction, reduction transfer, augmenting row reduction) are left out, as
/// Crouse does for rectangular matrices: they assume a square matrix, and the clusters solved
/// here are small. Cost: `O(n² m)` time in the worst case, `O(n + m)` extra memory.
///
/// # Forbidden pairs and infeasibility
/// `+∞` entries are never chosen. When the search for some row finds every remaining column at
/// infinite distance, no complete finite-cost assignment exists and [`ErrorKind::Infeasible`]
/// is returned.
///
/// # Determinism
/// Ties are broken by a fixed rule: among columns at equal tentative distance the search
/// prefers a free column, then the lowest column index. The same matrix always gives the same
/// assignment.
///
/// # Example
/// ```
/// use filter_core::assign::{CostMatrix, Solver};
/// let c = CostMatrix::from_rows(&[vec![4.0, 1.0], vec![2.0, 3.0]]).unwrap();
/// let mut solver = Solver::new();
/// let a = solver.solve(&c).unwrap();
/// assert_eq!(a.row_to_col, vec![1, 0]);
/// assert_eq!(a.cost, 3.0);
/// ```
#[derive(Debug, Clone, Default)]
pub struct Solver {
    /// Row duals.
    u: Vec<f64>,
    /// Column duals (`≤ 0`, zero on free columns after a cold solve).
    v: Vec<f64>,
    /// Tentative shortest-path distance to each column in the current search.
    spc: Vec<f64>,
    /// Predecessor row of each column on the current shortest-path tree.
    path: Vec<usize>,
    /// Column of each row, or `NONE`.
    col4row: Vec<usize>,
    /// Row of each column, or `NONE`.
    row4col: Vec<usize>,
    /// Column already finalised in the current search.
    scanned: Vec<bool>,
    /// Rows reached in the current search, in order (the first is the new row).
    scanned_rows: Vec<usize>,
    /// Columns finalised in the current search, in order.
    scanned_cols: Vec<usize>,
    /// Scratch copy of a matrix (transposed or negated).
    scratch: Vec<f64>,
}

impl Solver {
    /// A solver with empty buffers; they grow to the largest problem solved and are reused.
    pub fn new() -> Self {
        Self::default()
    }

    /// Minimum-cost assignment of every row of `c` (requires `rows ≤ cols`).
    ///
    /// # Errors
    /// [`ErrorKind::InvalidInput`] if `rows > cols` (use [`Solver::solve_any`]);
    /// [`ErrorKind::Infeasible`] if every complete assignment uses a forbidden entry.
    pub fn solve(&mut self, c: &CostMatrix) -> Result<Assignment> {
        check_shape(c.rows, c.cols)?;
        self.solve_slice(&c.data, c.rows, c.cols)?;
        Ok(self.assignment(&c.data, c.rows, c.cols))
    }

    /// Minimum-cost assignment for any shape: when `rows > cols` the transpose is solved, so
    /// every column is assigned and `rows − cols` rows get `None`.
    ///
    /// Returns, per row, the column it was given. The total is
    /// `Σ_{r: Some(c)} C[r][c]`, the minimum over all assignments of `min(rows, cols)` pairs.
    ///
    /// # Errors
    /// [`ErrorKind::Infeasible`] if no assignment of `min(rows, cols)` pairs avoids every
    /// forbidden entry.
    pub fn solve_any(&mut self, c: &CostMatrix) -> Result<Vec<Option<usize>>> {
        if c.rows <= c.cols {
            self.solve_slice(&c.data, c.rows, c.cols)?;
            return Ok(self.col4row[..c.rows].iter().map(|&j| Some(j)).collect());
        }
        let mut t = std::mem::take(&mut self.scratch);
        transpose_into(&c.data, c.rows, c.cols, &mut t);
        let solved = self.solve_slice(&t, c.cols, c.rows);
        self.scratch = t;
        solved?;
        let mut out = vec![None; c.rows];
        for (col, &row) in self.col4row[..c.cols].iter().enumerate() {
            out[row] = Some(col);
        }
        Ok(out)
    }

    /// Maximum-total assignment of every row of `c` (requires `rows ≤ cols`); `+∞` entries are
    /// still forbidden pairs. Solved as the minimisation of `−C` over the finite entries; the
    /// returned `cost` is the maximised total `Σ_r C[r][σ(r)]`.
    ///
    /// # Errors
    /// As [`Solver::solve`].
    pub fn solve_max(&mut self, c: &CostMatrix) -> Result<Assignment> {
        check_shape(c.rows, c.cols)?;
        let mut neg = std::mem::take(&mut self.scratch);
        neg.clear();
        neg.extend(c.data.iter().map(|&x| if x.is_finite() { -x } else { x }));
        let solved = self.solve_slice(&neg, c.rows, c.cols);
        self.scratch = neg;
        solved?;
        Ok(self.assignment(&c.data, c.rows, c.cols))
    }

    /// Cold solve of the row-major `nr × nc` problem in `data` (`nr ≤ nc`); the result is left
    /// in `col4row` / `row4col` and the optimal duals in `u` / `v`.
    pub(crate) fn solve_slice(&mut self, data: &[f64], nr: usize, nc: usize) -> Result<()> {
        debug_assert!(nr <= nc && data.len() == nr * nc);
        self.reset(nr, nc);
        for row in 0..nr {
            if !self.augment(data, nc, row) {
                return Err(infeasible(nr, nc, row));
            }
        }
        Ok(())
    }

    /// Size every buffer for an `nr × nc` problem and clear the matching and the duals.
    fn reset(&mut self, nr: usize, nc: usize) {
        self.u.clear();
        self.u.resize(nr, 0.0);
        self.col4row.clear();
        self.col4row.resize(nr, NONE);
        self.v.clear();
        self.v.resize(nc, 0.0);
        self.row4col.clear();
        self.row4col.resize(nc, NONE);
        self.spc.resize(nc, f64::INFINITY);
        self.path.resize(nc, NONE);
        self.scanned.resize(nc, false);
    }

    /// Load a warm state: duals `u`, `v` and a partial matching `col4row` (`NONE` for free
    /// rows). The caller guarantees dual feasibility and tightness on the matched pairs for the
    /// matrix it will augment against.
    pub(crate) fn load_state(&mut self, u: &[f64], v: &[f64], col4row: &[usize]) {
        let (nr, nc) = (u.len(), v.len());
        self.reset(nr, nc);
        self.u.copy_from_slice(u);
        self.v.copy_from_slice(v);
        self.col4row.copy_from_slice(col4row);
        for (i, &j) in col4row.iter().enumerate() {
            if j != NONE {
                self.row4col[j] = i;
            }
        }
    }

    /// Row duals of the current state.
    pub(crate) fn row_duals(&self) -> &[f64] {
        &self.u
    }

    /// Column duals of the current state.
    pub(crate) fn col_duals(&self) -> &[f64] {
        &self.v
    }

    /// Column of each row in the current state (`usize::MAX` for a free row).
    pub(crate) fn col_of_row(&self) -> &[usize] {
        &self.col4row
    }

    /// One shortest augmenting path from the free row `cur` against the row-major matrix
    /// `cost` with `nc` columns. Returns `false` (state unchanged apart from search scratch)
    /// when every remaining column is at infinite distance, i.e. `cur` cannot be added.
    ///
    /// Precondition: the duals are feasible for every matched row and tight on its matched pair.
    pub(crate) fn augment(&mut self, cost: &[f64], nc: usize, cur: usize) -> bool {
        debug_assert_eq!(self.col4row[cur], NONE);
        self.spc[..nc].fill(f64::INFINITY);
        self.scanned[..nc].fill(false);
        self.scanned_rows.clear();
        self.scanned_cols.clear();

        let mut min_val = 0.0;
        let mut i = cur;
        let sink = loop {
            self.scanned_rows.push(i);
            let row = &cost[i * nc..(i + 1) * nc];
            let ui = self.u[i];
            let mut lowest = f64::INFINITY;
            let mut best = NONE;
            for (j, &cij) in row.iter().enumerate() {
                if self.scanned[j] {
                    continue;
                }
                let r = min_val + cij - ui - self.v[j];
                if r < self.spc[j] {
                    self.path[j] = i;
                    self.spc[j] = r;
                }
                let s = self.spc[j];
                // Tie rule: a free column beats an assigned one at equal distance, then the
                // lowest index wins (strict comparison while scanning in index order).
                if best == NONE
                    || s < lowest
                    || (s == lowest && self.row4col[best] != NONE && self.row4col[j] == NONE)
                {
                    lowest = s;
                    best = j;
                }
            }
            if best == NONE || lowest == f64::INFINITY {
                return false;
            }
            min_val = lowest;
            self.scanned[best] = true;
            self.scanned_cols.push(best);
            if self.row4col[best] == NONE {
                break best;
            }
            i = self.row4col[best];
        };

        // Dual update (Crouse 2016, Alg. 1): keeps u_i + v_j ≤ C[i][j] and tightness.
        self.u[cur] += min_val;
        for &r in &self.scanned_rows[1..] {
            self.u[r] += min_val - self.spc[self.col4row[r]];
        }
        for &j in &self.scanned_cols {
            self.v[j] -= min_val - self.spc[j];
        }

        // Flip the alternating path back from the sink to `cur`.
        let mut j = sink;
        loop {
            let r = self.path[j];
            self.row4col[j] = r;
            let prev = std::mem::replace(&mut self.col4row[r], j);
            if r == cur {
                break;
            }
            j = prev;
        }
        true
    }

    /// The current complete matching of the first `nr` rows as an [`Assignment`], costed from
    /// `data` (row-major, `nc` columns).
    fn assignment(&self, data: &[f64], nr: usize, nc: usize) -> Assignment {
        let row_to_col = self.col4row[..nr].to_vec();
        let cost = total_cost(data, nc, &row_to_col);
        Assignment { row_to_col, cost }
    }
}

/// `Σ_r data[r][cols[r]]` in row order.
pub(crate) fn total_cost(data: &[f64], nc: usize, cols: &[usize]) -> f64 {
    cols.iter()
        .enumerate()
        .map(|(r, &c)| data[r * nc + c])
        .sum()
}

/// The solvers need at least as many columns as rows.
pub(crate) fn check_shape(rows: usize, cols: usize) -> Result<()> {
    if rows <= cols {
        Ok(())
    } else {
        Err(Error::input(format!(
            "assignment needs rows ≤ cols so that every row can be assigned, got a \
             {rows}×{cols} cost matrix; use solve_any to leave rows unassigned"
        )))
    }
}

/// The error for a problem whose rows `0..=row` cannot all get distinct finite-cost columns.
fn infeasible(nr: usize, nc: usize, row: usize) -> Error {
    Error::new(
        ErrorKind::Infeasible,
        format!(
            "no complete assignment of finite cost exists for the {nr}×{nc} cost matrix: rows \
             0..={row} cannot all be given distinct columns without using a forbidden (+inf) entry"
        ),
    )
}

/// Minimum-cost assignment of every row of `c` (requires `rows ≤ cols`), with a fresh
/// [`Solver`]. Call [`Solver::solve`] instead when solving many problems.
///
/// # Errors
/// As [`Solver::solve`].
pub fn solve(c: &CostMatrix) -> Result<Assignment> {
    Solver::new().solve(c)
}

/// Minimum-cost assignment for any shape, see [`Solver::solve_any`].
///
/// # Errors
/// As [`Solver::solve_any`].
pub fn solve_any(c: &CostMatrix) -> Result<Vec<Option<usize>>> {
    Solver::new().solve_any(c)
}

/// Maximum-total assignment, see [`Solver::solve_max`].
///
/// # Errors
/// As [`Solver::solve`].
pub fn solve_max(c: &CostMatrix) -> Result<Assignment> {
    Solver::new().solve_max(c)
}

#[cfg(test)]
pub(crate) mod tests {
    use super::*;
    use proptest::prelude::*;
    use rand::{Rng, SeedableRng};
    use rand_chacha::ChaCha8Rng;

    const INF: f64 = f64::INFINITY;

    fn m(rows: &[&[f64]]) -> CostMatrix {
        CostMatrix::from_rows(&rows.iter().map(|r| r.to_vec()).collect::<Vec<_>>())
            .expect("test matrix is valid")
    }

    /// Every complete assignment of finite cost (rows ≤ cols), by enumeration straight from
    /// the definition, in lexicographic order of the column vector. Reference for the solver
    /// and for the k-best tests.
    pub(crate) fn brute_force_all(c: &CostMatrix) -> Vec<Assignment> {
        fn rec(
            c: &CostMatrix,
            r: usize,
            used: &mut [bool],
            cur: &mut Vec<usize>,
            out: &mut Vec<Assignment>,
        ) {
            if r == c.rows() {
                let cost = total_cost(c.as_slice(), c.cols(), cur);
                out.push(Assignment {
                    row_to_col: cur.clone(),
                    cost,
                });
                return;
            }
            for j in 0..c.cols() {
                if !used[j] && c.get(r, j).is_finite() {
                    used[j] = true;
                    cur.push(j);
                    rec(c, r + 1, used, cur, out);
                    cur.pop();
                    used[j] = false;
                }
            }
        }
        let mut out = Vec::new();
        rec(c, 0, &mut vec![false; c.cols()], &mut Vec::new(), &mut out);
        out
    }

    /// Check that `a` is a valid complete assignment of `c` whose cost is its entry sum.
    pub(crate) fn assert_valid(c: &CostMatrix, a: &Assignment) {
        assert_eq!(a.row_to_col.len(), c.rows());
        let mut used = vec![false; c.cols()];
        for (r, &j) in a.row_to_col.iter().enumerate() {
            assert!(
                j < c.cols() && !used[j],
                "column {j} reused or out of range"
            );
            used[j] = true;
            assert!(c.get(r, j).is_finite(), "forbidden pair ({r}, {j}) used");
        }
        assert_eq!(a.cost, total_cost(c.as_slice(), c.cols(), &a.row_to_col));
    }

    /// Data-driven check against check-values.md §5 (scipy linear_sum_assignment, confirmed by
    /// brute-force enumeration there): exact column vector and exact total.
    fn check(rows: &[&[f64]], cols: &[usize], total: f64) {
        let c = m(rows);
        let a = solve(&c).expect("feasible");
        assert_eq!(a.row_to_col, cols);
        assert_eq!(a.cost, total);
    }

    #[test]
    fn check_values_5_square_4x4() {
        // check-values.md §5, "4×4": greedy gives 16, the optimum is 13.
        check(
            &[
                &[2., 8., 2., 5.],
                &[8., 3., 4., 3.],
                &[7., 3., 9., 5.],
                &[5., 5., 6., 5.],
            ],
            &[2, 3, 1, 0],
            13.0,
        );
    }

    const FIVE: [[f64; 5]; 5] = [
        [5., 14., 2., 5., 7.],
        [7., 19., 16., 19., 20.],
        [2., 3., 18., 2., 4.],
        [4., 19., 8., 6., 4.],
        [10., 12., 17., 13., 20.],
    ];

    #[test]
    fn check_values_5_square_5x5() {
        // check-values.md §5, "5×5": optimum 27 (greedy 39).
        let rows: Vec<&[f64]> = FIVE.iter().map(|r| r.as_slice()).collect();
        check(&rows, &[2, 0, 3, 4, 1], 27.0);
    }

    #[test]
    fn check_values_5_rectangular_3x5() {
        // check-values.md §5, "3×5 (rect.)": columns 1 and 4 unused, optimum 7.
        check(
            &[
                &[6., 7., 7., 4., 9.],
                &[1., 3., 2., 1., 9.],
                &[1., 5., 8., 7., 8.],
            ],
            &[3, 2, 0],
            7.0,
        );
    }

    #[test]
    fn check_values_5_forbidden_4x4() {
        // check-values.md §5, "4×4 with ∞ = forbidden": optimum 5.
        check(
            &[
                &[1., INF, 3., INF],
                &[INF, 2., INF, 1.],
                &[2., 1., INF, INF],
                &[INF, 4., 2., 3.],
            ],
            &[0, 3, 1, 2],
            5.0,
        );
    }

    #[test]
    fn check_values_5_maximise_5x5() {
        // check-values.md §5, "5×5 above, maximise": optimum 81.
        let rows: Vec<&[f64]> = FIVE.iter().map(|r| r.as_slice()).collect();
        let a = solve_max(&m(&rows)).expect("feasible");
        assert_eq!(a.row_to_col, vec![0, 3, 2, 1, 4]);
        assert_eq!(a.cost, 81.0);
    }

    #[test]
    fn infeasible_problem_is_an_infeasible_error() {
        // Rows 0 and 1 can both use only column 0: no complete finite assignment exists.
        let c = m(&[&[1., INF, INF], &[2., INF, INF], &[3., 4., 5.]]);
        let e = solve(&c).unwrap_err();
        assert_eq!(e.kind(), ErrorKind::Infeasible);
        assert_eq!(
            e.message(),
            "no complete assignment of finite cost exists for the 3×3 cost matrix: rows 0..=1 \
             cannot all be given distinct columns without using a forbidden (+inf) entry"
        );
        // A row with no finite entry at all.
        let c = m(&[&[INF, INF], &[1., 2.]]);
        assert_eq!(solve(&c).unwrap_err().kind(), ErrorKind::Infeasible);
        assert_eq!(solve_max(&c).unwrap_err().kind(), ErrorKind::Infeasible);
    }

    #[test]
    fn more_rows_than_columns_is_rejected_naming_the_shape() {
        let c = m(&[&[1.], &[2.]]);
        let e = solve(&c).unwrap_err();
        assert_eq!(e.kind(), ErrorKind::InvalidInput);
        assert!(
            e.message().contains("got a 2×1 cost matrix"),
            "{}",
            e.message()
        );
    }

    #[test]
    fn solve_any_transposes_tall_matrices() {
        // The transpose of the §5 3×5 case: each of its columns 0, 2, 3 gets rows 2, 1, 0.
        let wide = m(&[
            &[6., 7., 7., 4., 9.],
            &[1., 3., 2., 1., 9.],
            &[1., 5., 8., 7., 8.],
        ]);
        let tall = wide.transpose();
        assert_eq!(
            solve_any(&tall).expect("feasible"),
            vec![Some(2), None, Some(1), Some(0), None]
        );
        assert_eq!(
            solve_any(&wide).expect("feasible"),
            vec![Some(3), Some(2), Some(0)]
        );
    }

    #[test]
    fn empty_problems() {
        let a = solve(&CostMatrix::new(0, 0, vec![]).expect("valid")).expect("trivial");
        assert_eq!(
            a,
            Assignment {
                row_to_col: vec![],
                cost: 0.0
            }
        );
        let a = solve(&CostMatrix::new(0, 3, vec![]).expect("valid")).expect("trivial");
        assert!(a.row_to_col.is_empty());
        assert_eq!(
            solve_any(&CostMatrix::new(2, 0, vec![]).expect("valid")),
            Ok(vec![None, None])
        );
    }

    #[test]
    fn matrix_constructors_reject_bad_input_with_messages() {
        let e = CostMatrix::new(2, 2, vec![1.0; 3]).unwrap_err();
        assert_eq!(
            e.message(),
            "cost matrix data must have rows × cols = 2×2 = 4 entries, got 3"
        );
        let e = CostMatrix::new(1, 2, vec![0.0, f64::NAN]).unwrap_err();
        assert!(
            e.message()
                .starts_with("cost matrix entry (0, 1) must be finite"),
            "{e}"
        );
        let e = CostMatrix::new(2, 1, vec![0.0, f64::NEG_INFINITY]).unwrap_err();
        assert!(e.message().starts_with("cost matrix entry (1, 0)"), "{e}");
        assert!(CostMatrix::new(1, 1, vec![1e200]).is_err());
        let e = CostMatrix::from_rows(&[vec![1.0, 2.0], vec![3.0]]).unwrap_err();
        assert_eq!(
            e.message(),
            "cost matrix rows must all have the same length: row 0 has 2 entries, row 1 has 1"
        );
        let mut c = CostMatrix::new(1, 2, vec![0.0, 0.0]).expect("valid");
        assert!(c.set(0, 1, f64::NAN).is_err());
        assert!(c.set(1, 0, 1.0).is_err());
        c.set(0, 1, INF).expect("inf is a forbidden pair");
        assert_eq!((c.get(0, 1), c.rows(), c.cols()), (INF, 1, 2));
    }

    /// A random rows ≤ cols ≤ 8 matrix with small integer costs (many ties), some negative,
    /// and about one entry in five forbidden (`None`).
    fn int_matrix() -> impl Strategy<Value = (usize, usize, Vec<Option<i64>>)> {
        (1usize..=8)
            .prop_flat_map(|r| (Just(r), r..=8))
            .prop_flat_map(|(r, c)| {
                let cell = prop_oneof![4 => (-3i64..8).prop_map(Some), 1 => Just(None)];
                (Just(r), Just(c), proptest::collection::vec(cell, r * c))
            })
    }

    fn to_cost(rows: usize, cols: usize, cells: &[Option<i64>]) -> CostMatrix {
        let data = cells.iter().map(|x| x.map_or(INF, |v| v as f64)).collect();
        CostMatrix::new(rows, cols, data).expect("valid")
    }

    /// Reference total from `pathfinding::kuhn_munkres_min` (the general-purpose Hungarian
    /// method crate). Forbidden pairs become `BIG`. A feasible total has magnitude at most
    /// 8 · 7 = 56, while any assignment through a forbidden pair costs at least `BIG − 8 · 3`,
    /// so a reference total `≥ BIG / 2` means no finite assignment exists.
    const BIG: i64 = 1_000_000;

    fn reference_min(rows: usize, cols: usize, cells: &[Option<i64>]) -> Option<i64> {
        let w = pathfinding::matrix::Matrix::from_vec(
            rows,
            cols,
            cells.iter().map(|x| x.unwrap_or(BIG)).collect(),
        )
        .expect("shape matches");
        let (total, _) = pathfinding::kuhn_munkres::kuhn_munkres_min(&w);
        (total < BIG / 2).then_some(total)
    }

    proptest! {
        #[test]
        fn minimum_matches_kuhn_munkres_and_brute_force((rows, cols, cells) in int_matrix()) {
            let c = to_cost(rows, cols, &cells);
            let ours = solve(&c);
            match reference_min(rows, cols, &cells) {
                Some(total) => {
                    let a = ours.expect("reference found a feasible assignment");
                    assert_valid(&c, &a);
                    prop_assert_eq!(a.cost, total as f64);
                }
                None => prop_assert_eq!(ours.unwrap_err().kind(), ErrorKind::Infeasible),
            }
            if cols <= 6 {
                let best = brute_force_all(&c).iter().map(|a| a.cost).min_by(f64::total_cmp);
                prop_assert_eq!(solve(&c).ok().map(|a| a.cost), best);
            }
        }

        #[test]
        fn maximum_matches_kuhn_munkres((rows, cols, cells) in int_matrix()) {
            // Feasible-only variant: forbidden cells become ordinary costs, so the reference
            // (pathfinding::kuhn_munkres, maximising) applies directly.
            let full: Vec<Option<i64>> = cells.iter().map(|x| Some(x.unwrap_or(5))).collect();
            let c = to_cost(rows, cols, &full);
            let w = pathfinding::matrix::Matrix::from_vec(
                rows, cols, full.iter().map(|x| x.unwrap_or(0)).collect()).expect("shape");
            let (total, _) = pathfinding::kuhn_munkres::kuhn_munkres(&w);
            let a = solve_max(&c).expect("no forbidden entries");
            assert_valid(&c, &a);
            prop_assert_eq!(a.cost, total as f64);
        }

        #[test]
        fn solve_any_pairs_min_side_and_matches_transpose((rows, cols, cells) in int_matrix()) {
            // A tall matrix is solved through its transpose; compare with brute force on the
            // wide one (a partial assignment of the tall matrix is a complete one of the wide).
            let wide = to_cost(rows, cols, &cells);
            let tall = wide.transpose();
            let any = solve_any(&tall);
            match solve(&wide) {
                Ok(a) => {
                    let got = any.expect("feasible");
                    let total: f64 = got.iter().enumerate()
                        .filter_map(|(r, c)| c.map(|c| tall.get(r, c))).sum();
                    prop_assert_eq!(got.iter().flatten().count(), rows);
                    prop_assert_eq!(total, a.cost);
                }
                Err(e) => prop_assert_eq!(any.unwrap_err().kind(), e.kind()),
            }
        }
    }

    #[test]
    fn reused_solver_agrees_with_kuhn_munkres_on_larger_random_matrices() {
        // Seeded, so deterministic. Costs are multiples of 1/1024 (exact in f64); the reference
        // is pathfinding::kuhn_munkres_min on the integer numerators. One Solver serves every
        // size, in a mixed order, to exercise buffer reuse.
        let mut rng = ChaCha8Rng::seed_from_u64(0x5eed_a551);
        let mut solver = Solver::new();
        for _ in 0..60 {
            let rows = rng.random_range(1..=30);
            let cols = rng.random_range(rows..=40);
            let ints: Vec<i64> = (0..rows * cols)
                .map(|_| rng.random_range(0..100_000))
                .collect();
            let c = CostMatrix::new(
                rows,
                cols,
                ints.iter().map(|&x| x as f64 / 1024.0).collect(),
            )
            .expect("valid");
            let w = pathfinding::matrix::Matrix::from_vec(rows, cols, ints).expect("shape");
            let (total, _) = pathfinding::kuhn_munkres::kuhn_munkres_min(&w);
            let a = solver.solve(&c).expect("no forbidden entries");
            assert_valid(&c, &a);
            assert_eq!(a.cost, total as f64 / 1024.0);
        }
    }

    #[test]
    fn float_costs_match_brute_force() {
        // Non-dyadic costs: the total must equal the brute-force minimum to rounding.
        let mut rng = ChaCha8Rng::seed_from_u64(7);
        for _ in 0..200 {
            let rows = rng.random_range(1..=5);
            let cols = rng.random_range(rows..=6);
            let data = (0..rows * cols)
                .map(|_| {
                    if rng.random_bool(0.15) {
                        INF
                    } else {
                        rng.random_range(-10.0..10.0)
                    }
                })
                .collect();
            let c = CostMatrix::new(rows, cols, data).expect("valid");
            let best = brute_force_all(&c)
                .iter()
                .map(|a| a.cost)
                .min_by(f64::total_cmp);
            match (solve(&c), best) {
                (Ok(a), Some(b)) => assert!((a.cost - b).abs() <= 1e-9, "{} vs {b}", a.cost),
                (Err(e), None) => assert_eq!(e.kind(), ErrorKind::Infeasible),
                (got, want) => panic!("solver {got:?} but brute force {want:?}"),
            }
        }
    }

    #[test]
    fn ties_are_broken_the_same_way_every_time() {
        // All-equal costs: any permutation is optimal; the rule picks the same one each time,
        // including with a reused solver that previously solved another shape.
        let c = CostMatrix::new(4, 5, vec![1.0; 20]).expect("valid");
        let first = solve(&c).expect("feasible");
        let mut s = Solver::new();
        s.solve(&m(&[&[3., 1.], &[0., 2.]])).expect("feasible");
        assert_eq!(s.solve(&c).expect("feasible"), first);
        assert_eq!(first.cost, 4.0);
    }
}
