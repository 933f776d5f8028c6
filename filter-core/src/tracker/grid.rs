//! Uniform-grid spatial index of one scan's detections in the site plane.
//!
//! **Why a grid and not a k-d tree.** Detections of one scan are rebuilt into the index every
//! scan, and every query is a small axis-aligned box (the gate's bounding box) of about the same
//! size. A uniform grid makes gating cost
//! O(n + m) instead of O(n m): the grid is a dense array of cells over the detections' bounding
//! box, filled by a counting sort, and a query reads the cells its box covers directly. A k-d
//! tree would cost O(m log m) to build and O(log m) per query, with worse cache behaviour for
//! such small, uniform queries. The cell size is set per scan from the median gate half-width,
//! so a query touches about nine cells whatever the sensor's scale, and is enlarged when the
//! detections are spread so far that the grid would need more than four cells per detection.

/// A grid over points: a dense array of cells over the points' bounding box, filled by a
/// counting sort (cell start offsets plus point indices grouped by cell).
#[derive(Debug, Default, Clone)]
pub(crate) struct Grid {
    cell: f64,
    x0: f64,
    y0: f64,
    nx: usize,
    ny: usize,
    /// `starts[c]..starts[c + 1]` indexes `items` for cell c (row-major, nx columns).
    starts: Vec<u32>,
    items: Vec<u32>,
    keys: Vec<u32>,
}

/// At most this many cells per point, so that memory stays linear in the scan size when the
/// detections are spread far apart; the cell size grows instead.
const CELLS_PER_POINT: f64 = 4.0;

impl Grid {
    /// Rebuild the index over `points` (m) with square cells of about `cell` metres.
    pub(crate) fn rebuild(&mut self, points: &[[f64; 2]], cell: f64) {
        self.items.clear();
        self.keys.clear();
        self.starts.clear();
        if points.is_empty() {
            self.nx = 0;
            self.ny = 0;
            return;
        }
        let (mut x0, mut y0, mut x1, mut y1) = (
            f64::INFINITY,
            f64::INFINITY,
            f64::NEG_INFINITY,
            f64::NEG_INFINITY,
        );
        for p in points {
            x0 = x0.min(p[0]);
            y0 = y0.min(p[1]);
            x1 = x1.max(p[0]);
            y1 = y1.max(p[1]);
        }
        let mut cell = cell.max(1e-3);
        let max_cells = (CELLS_PER_POINT * points.len() as f64).max(16.0);
        let area_cells = ((x1 - x0) / cell + 1.0) * ((y1 - y0) / cell + 1.0);
        if area_cells > max_cells {
            cell *= (area_cells / max_cells).sqrt();
        }
        self.cell = cell;
        self.x0 = x0;
        self.y0 = y0;
        self.nx = ((x1 - x0) / cell) as usize + 1;
        self.ny = ((y1 - y0) / cell) as usize + 1;
        let n_cells = self.nx * self.ny;
        self.starts.resize(n_cells + 1, 0);
        self.keys.reserve(points.len());
        for p in points {
            let cx = (((p[0] - x0) / cell) as usize).min(self.nx - 1);
            let cy = (((p[1] - y0) / cell) as usize).min(self.ny - 1);
            let k = (cy * self.nx + cx) as u32;
            self.keys.push(k);
            self.starts[k as usize + 1] += 1;
        }
        for c in 0..n_cells {
            self.starts[c + 1] += self.starts[c];
        }
        self.items.resize(points.len(), 0);
        let mut fill: Vec<u32> = self.starts[..n_cells].to_vec();
        for (i, &k) in self.keys.iter().enumerate() {
            let slot = &mut fill[k as usize];
            self.items[*slot as usize] = i as u32;
            *slot += 1;
        }
    }

    /// Append to `out` the indices of every point in a cell that intersects the box
    /// [x0, x1] × [y0, y1], in ascending index order within each cell. Candidates are a
    /// superset of the points inside the box.
    pub(crate) fn query(&self, x0: f64, y0: f64, x1: f64, y1: f64, out: &mut Vec<u32>) {
        if self.nx == 0 {
            return;
        }
        let gx1 = self.x0 + self.nx as f64 * self.cell;
        let gy1 = self.y0 + self.ny as f64 * self.cell;
        if x1 < self.x0 || y1 < self.y0 || x0 > gx1 || y0 > gy1 {
            return;
        }
        let cx0 = (((x0 - self.x0) / self.cell).max(0.0) as usize).min(self.nx - 1);
        let cx1 = (((x1 - self.x0) / self.cell).max(0.0) as usize).min(self.nx - 1);
        let cy0 = (((y0 - self.y0) / self.cell).max(0.0) as usize).min(self.ny - 1);
        let cy1 = (((y1 - self.y0) / self.cell).max(0.0) as usize).min(self.ny - 1);
        for cy in cy0..=cy1 {
            let a = self.starts[cy * self.nx + cx0] as usize;
            let b = self.starts[cy * self.nx + cx1 + 1] as usize;
            out.extend_from_slice(&self.items[a..b]);
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn query_returns_a_superset_of_the_box_and_nothing_far() {
        let pts: Vec<[f64; 2]> = (0..400)
            .map(|i| {
                [
                    ((i * 37) % 200) as f64 * 10.0 - 1000.0,
                    ((i * 91) % 200) as f64 * 10.0 - 1000.0,
                ]
            })
            .collect();
        let mut g = Grid::default();
        g.rebuild(&pts, 50.0);
        let mut out = Vec::new();
        g.query(-120.0, -80.0, 30.0, 70.0, &mut out);
        for (i, p) in pts.iter().enumerate() {
            let inside = p[0] >= -120.0 && p[0] <= 30.0 && p[1] >= -80.0 && p[1] <= 70.0;
            if inside {
                assert!(out.contains(&(i as u32)), "point {i} missing");
            }
        }
        // Nothing farther than one (possibly enlarged) cell outside the box comes back.
        let c = g.cell;
        assert!((50.0..60.0).contains(&c), "cell {c}");
        for &i in &out {
            let p = pts[i as usize];
            assert!(
                p[0] >= -120.0 - c && p[0] <= 30.0 + c && p[1] >= -80.0 - c && p[1] <= 70.0 + c,
                "{p:?}"
            );
        }
    }
}
