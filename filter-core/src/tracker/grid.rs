//! Uniform-grid spatial index of one scan's detections in the site plane.
//!
//! **Why a grid and not a k-d tree.** Detections of one scan are rebuilt into the index every
//! scan, and every query is a small axis-aligned box (the gate's bounding box) of about the same
//! size. A uniform grid is built by one sort (O(m log m) with a tiny constant, no pointers) and
//! answers a box query by one binary search per grid row it covers, so gating costs
//! O((n + m) log m) instead of O(n m). A k-d tree has the same asymptotics but a costlier build
//! and worse cache behaviour for such small, uniform queries. The cell size is set per scan from
//! the median gate half-width, so a query touches about nine cells whatever the sensor's scale.

/// A grid over points, stored as (cell key, point index) pairs sorted by key.
#[derive(Debug, Default, Clone)]
pub(crate) struct Grid {
    cell: f64,
    entries: Vec<(i64, u32)>,
}

/// Column offset inside a key: keys are row * STRIDE + column, with columns shifted positive.
const STRIDE: i64 = 1 << 31;
const SHIFT: i64 = 1 << 30;

impl Grid {
    /// Rebuild the index over `points` (m) with square cells of `cell` metres.
    pub(crate) fn rebuild(&mut self, points: &[[f64; 2]], cell: f64) {
        self.cell = cell.max(1e-3);
        self.entries.clear();
        self.entries.reserve(points.len());
        for (i, p) in points.iter().enumerate() {
            let (cx, cy) = self.cell_of(p[0], p[1]);
            self.entries.push((cy * STRIDE + cx + SHIFT, i as u32));
        }
        self.entries.sort_unstable();
    }

    fn cell_of(&self, x: f64, y: f64) -> (i64, i64) {
        let cx = ((x / self.cell).floor() as i64).clamp(-SHIFT + 1, SHIFT - 1);
        let cy = ((y / self.cell).floor() as i64).clamp(-SHIFT + 1, SHIFT - 1);
        (cx, cy)
    }

    /// Append to `out` the indices of every point in a cell that intersects the box
    /// [x0, x1] × [y0, y1]. Candidates are a superset of the points inside the box.
    pub(crate) fn query(&self, x0: f64, y0: f64, x1: f64, y1: f64, out: &mut Vec<u32>) {
        if self.entries.is_empty() {
            return;
        }
        let (cx0, cy0) = self.cell_of(x0, y0);
        let (cx1, cy1) = self.cell_of(x1, y1);
        // A box spanning very many rows (a track with a huge gate): scan everything instead.
        if (cy1 - cy0 + 1).saturating_mul(cx1 - cx0 + 1) > self.entries.len() as i64 {
            out.extend(self.entries.iter().map(|e| e.1));
            return;
        }
        for cy in cy0..=cy1 {
            let lo = cy * STRIDE + cx0 + SHIFT;
            let hi = cy * STRIDE + cx1 + SHIFT;
            let start = self.entries.partition_point(|e| e.0 < lo);
            for e in &self.entries[start..] {
                if e.0 > hi {
                    break;
                }
                out.push(e.1);
            }
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
        for &i in &out {
            let p = pts[i as usize];
            assert!(p[0] >= -150.0 && p[0] <= 50.0 && p[1] >= -100.0 && p[1] <= 100.0);
        }
    }
}
