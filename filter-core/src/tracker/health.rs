//! Per-sensor filter-health statistics over a sliding window of scans.
//!
//! These tell an operator whether the configured clutter rate and detection probability still
//! describe the sensor, and whether the filter is consistent:
//! - **clutter rate estimate** per scan: m − Σ_{t confirmed} Σ_j β_tj, the detections of the
//!   scan not explained by confirmed tracks (weighted by association probability). Its mean
//!   over the window estimates λ̄_c plus the (small) rate of new objects.
//! - **detection probability estimate**: Σ_t (1 − β_t0) / (P_G n), over the n confirmed tracks
//!   the sensor covered; 1 − β_t0 is the probability that track t was detected in the scan, whose
//!   expectation is P_D P_G when the model holds.
//! - **NIS** ν S⁻¹ νᵀ of the most probable detection of each confirmed track when that
//!   detection's probability exceeds ½. Under the model it is chi-square with dim(z) degrees of
//!   freedom truncated at the gate, so its mean is a little below dim(z) and the share outside
//!   the two-sided 95 % interval [F⁻¹(0.025), F⁻¹(0.975)] is about (0.025 + (0.025 − (1 − P_G)))
//!   / P_G, e.g. 4.0 % for P_G = 0.99 (Bar-Shalom, Li & Kirubarajan 2001, §5.4.2 for the
//!   unconditioned test).

use std::collections::VecDeque;

/// Sums of one scan's health quantities.
#[derive(Debug, Clone, Copy, Default, PartialEq)]
pub(crate) struct ScanHealth {
    pub(crate) clutter: f64,
    pub(crate) detected: f64,
    pub(crate) covered: f64,
    pub(crate) nis_sum: f64,
    pub(crate) nis_outside: u32,
    pub(crate) nis_count: u32,
}

/// Sliding window of [`ScanHealth`] with running sums.
#[derive(Debug, Clone, Default)]
pub(crate) struct HealthWindow {
    capacity: usize,
    pub(crate) scans: VecDeque<ScanHealth>,
    pub(crate) sum: ScanHealth,
    pub(crate) total_scans: u64,
}

impl HealthWindow {
    pub(crate) fn new(capacity: usize) -> Self {
        Self {
            capacity: capacity.max(1),
            ..Self::default()
        }
    }

    pub(crate) fn push(&mut self, h: ScanHealth) {
        if self.scans.len() == self.capacity {
            if let Some(old) = self.scans.pop_front() {
                self.sum.clutter -= old.clutter;
                self.sum.detected -= old.detected;
                self.sum.covered -= old.covered;
                self.sum.nis_sum -= old.nis_sum;
                self.sum.nis_outside -= old.nis_outside;
                self.sum.nis_count -= old.nis_count;
            }
        }
        self.sum.clutter += h.clutter;
        self.sum.detected += h.detected;
        self.sum.covered += h.covered;
        self.sum.nis_sum += h.nis_sum;
        self.sum.nis_outside += h.nis_outside;
        self.sum.nis_count += h.nis_count;
        self.scans.push_back(h);
        self.total_scans += 1;
    }

    pub(crate) fn len(&self) -> usize {
        self.scans.len()
    }

    /// Mean clutter count per scan over the window (recomputed exactly to avoid drift).
    pub(crate) fn clutter_rate(&self) -> Option<f64> {
        if self.scans.is_empty() {
            return None;
        }
        Some(self.scans.iter().map(|s| s.clutter).sum::<f64>().max(0.0) / self.scans.len() as f64)
    }

    pub(crate) fn detection_probability(&self, gate_probability: f64) -> Option<f64> {
        let covered: f64 = self.scans.iter().map(|s| s.covered).sum();
        if covered < 1.0 {
            return None;
        }
        let detected: f64 = self.scans.iter().map(|s| s.detected).sum();
        Some((detected / (gate_probability * covered)).clamp(0.0, 1.0))
    }

    pub(crate) fn nis(&self) -> (Option<f64>, Option<f64>, usize) {
        let n = self.sum.nis_count as usize;
        if n == 0 {
            return (None, None, 0);
        }
        let s: f64 = self.scans.iter().map(|s| s.nis_sum).sum();
        (
            Some(s / n as f64),
            Some(self.sum.nis_outside as f64 / n as f64),
            n,
        )
    }
}
