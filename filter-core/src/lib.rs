//! placeholder
pub mod error;
pub mod gaussian;
pub mod measurement;
pub mod motion;
pub mod stats;
pub use error::{Error, ErrorKind, Result};
