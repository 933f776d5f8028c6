//! placeholder
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
