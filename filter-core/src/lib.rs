//! placeholder
pub mod clutter;
pub mod error;
pub mod gating;
pub mod gaussian;
pub mod measurement;
pub mod motion;
pub mod single;
pub mod stats;
pub use error::{Error, ErrorKind, Result};
