//! # filter-core
//!
//! The estimation library behind plotweave: everything needed to turn scans of detections,
//! in which objects are sometimes missed and clutter appears every scan, into tracks. It is
//! pure, synchronous and deterministic: **no I/O, no async, no JSON, no sockets, no metrics**.
//!
//! The main type is [`tracker::Tracker`]: one site's live tracks, updated scan by scan from any
//! number of sensors, each with its own measurement model and its own clutter measurement model
//! (detection probability P_D, Poisson clutter of mean λ̄_c per scan, uniform clutter density
//! f_c over its field of view). Around it:
//!
//! | module | owns |
//! |---|---|
//! | [`stats`] | special functions: ln Γ, incomplete gamma, chi-square cdf/quantile, Poisson, normal densities |
//! | [`gaussian`] | Gaussian states and the Joseph-form Kalman update ([`gaussian::PreparedUpdate`]) |
//! | [`motion`] | constant velocity (CWNA / DWNA), constant acceleration, coordinated turn |
//! | [`measurement`] | cartesian and polar (range, bearing, range rate) models, converted measurements, unscented transform |
//! | [`clutter`] | the clutter measurement model, the full scan likelihood as a sum over association hypotheses, association weights |
//! | [`gating`] | ellipsoidal gates from the gate probability |
//! | [`single`] | single-object filters in clutter: nearest neighbour, PDA, Gaussian sum |
//! | [`assign`], [`murty`] | optimal 2-D assignment (Jonker–Volgenant) and the k best assignments (Murty) |
//! | [`tracker`] | the multi-object tracker: gating index, clustering, GNN / JPDA, existence-based track management, reorder window, health statistics |
//! | [`gospa`] | the GOSPA metric for evaluation |
//! | [`sim`] | a seeded scenario simulator drawing scans from the same measurement model |
//!
//! ```
//! use filter_core::clutter::{association_weights, scan_log_likelihood};
//! // Two detections in a scan: ln g(z|x) for each, and the clutter density ln f_c at each.
//! let ln_g = [-6.0, -9.0];
//! let ln_fc = [-12.0, -12.0];
//! // The scan likelihood summed over θ ∈ {missed, z₁, z₂}, P_D = 0.9, λ̄_c = 5 per scan.
//! let ll = scan_log_likelihood(&ln_g, &ln_fc, 0.9, 5.0).unwrap();
//! assert!(ll.is_finite());
//! // The normalised weights the filters use (clutter intensity κ = λ̄_c f_c, no gate).
//! let kappa = [(5.0f64).ln() - 12.0; 2];
//! let beta = association_weights(&ln_g, &kappa, 0.9, 1.0);
//! assert!((beta.iter().sum::<f64>() - 1.0).abs() < 1e-12);
//! ```
//!
//! **The one design choice to know:** every association decision, whether a single-object
//! filter's, GNN's or JPDA's, is built from the same per-pair likelihood ratio of the clutter
//! measurement model, P_D g(z | x) / (λ̄_c f_c(z)) against the missed-detection term
//! 1 − P_D P_G. That is what makes the configured λ̄_c and P_D of each sensor matter, and what
//! the health statistics check against the data.
#![deny(missing_docs)]

pub mod assign;
pub mod clutter;
pub mod error;
pub mod gating;
pub mod gaussian;
pub mod gospa;
pub mod measurement;
pub mod motion;
pub mod murty;
pub mod sim;
pub mod single;
pub mod stats;
pub mod tracker;

pub use error::{Error, ErrorKind, Result};
