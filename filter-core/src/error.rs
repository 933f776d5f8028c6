//! The crate's one error type.
//!
//! Every fallible function in `filter-core` returns [`Error`]. Its [`Display`](std::fmt::Display)
//! is written for the person who configured the tracker: it names the parameter or input that
//! was wrong and the rule it broke, e.g. `detection probability must be in (0, 1], got 1.3`.

use std::fmt;

/// What kind of problem an [`Error`] reports.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash)]
#[non_exhaustive]
pub enum ErrorKind {
    /// A configuration parameter is out of its valid range (probability outside [0, 1], a
    /// negative noise standard deviation, an empty field of view, ...).
    InvalidParameter,
    /// An input value (state, covariance, measurement) is not finite or breaks a precondition
    /// such as symmetry or positive definiteness.
    InvalidInput,
    /// A time step was negative: the caller asked to predict backwards in time.
    NegativeTimeStep,
    /// A matrix that must be invertible (innovation covariance) was singular or not positive
    /// definite, so the update could not be computed.
    Singular,
    /// A scan arrived older than the reorder window allows and was refused.
    LateScan,
    /// A scan named a sensor the tracker does not know.
    UnknownSensor,
    /// An assignment problem has no feasible solution (every completion uses a forbidden pair).
    Infeasible,
}

/// The error type of `filter-core`: a [`ErrorKind`] plus a message meant for a user.
#[derive(Debug, Clone, PartialEq)]
pub struct Error {
    kind: ErrorKind,
    message: String,
}

impl Error {
    /// A new error of `kind` with a message that says what was wrong.
    pub fn new(kind: ErrorKind, message: impl Into<String>) -> Self {
        Self {
            kind,
            message: message.into(),
        }
    }

    /// Shorthand for an [`ErrorKind::InvalidParameter`] error.
    pub fn param(message: impl Into<String>) -> Self {
        Self::new(ErrorKind::InvalidParameter, message)
    }

    /// Shorthand for an [`ErrorKind::InvalidInput`] error.
    pub fn input(message: impl Into<String>) -> Self {
        Self::new(ErrorKind::InvalidInput, message)
    }

    /// What kind of problem this is, for callers that count or branch on it.
    pub fn kind(&self) -> ErrorKind {
        self.kind
    }

    /// The user-facing message (the same text as `Display`).
    pub fn message(&self) -> &str {
        &self.message
    }
}

impl fmt::Display for Error {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str(&self.message)
    }
}

impl std::error::Error for Error {}

/// The crate's result type.
pub type Result<T> = std::result::Result<T, Error>;

/// Check that `value` is a probability in the closed interval `[lo_incl?, 1]`.
///
/// `name` is the parameter's human name, used in the message.
pub(crate) fn check_prob(name: &str, value: f64, allow_zero: bool, allow_one: bool) -> Result<f64> {
    let lo_ok = if allow_zero {
        value >= 0.0
    } else {
        value > 0.0
    };
    let hi_ok = if allow_one { value <= 1.0 } else { value < 1.0 };
    if value.is_finite() && lo_ok && hi_ok {
        Ok(value)
    } else {
        let lo = if allow_zero { "[0" } else { "(0" };
        let hi = if allow_one { "1]" } else { "1)" };
        Err(Error::param(format!(
            "{name} must be in {lo}, {hi}, got {value}"
        )))
    }
}

/// Check that `value` is finite and strictly positive.
pub(crate) fn check_positive(name: &str, value: f64) -> Result<f64> {
    if value.is_finite() && value > 0.0 {
        Ok(value)
    } else {
        Err(Error::param(format!(
            "{name} must be finite and greater than 0, got {value}"
        )))
    }
}

/// Check that `value` is finite and not negative.
pub(crate) fn check_non_negative(name: &str, value: f64) -> Result<f64> {
    if value.is_finite() && value >= 0.0 {
        Ok(value)
    } else {
        Err(Error::param(format!(
            "{name} must be finite and at least 0, got {value}"
        )))
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn probability_message_names_parameter_and_rule() {
        let e = check_prob("detection probability", 1.3, false, true).unwrap_err();
        assert_eq!(
            e.to_string(),
            "detection probability must be in (0, 1], got 1.3"
        );
        assert_eq!(e.kind(), ErrorKind::InvalidParameter);
        assert!(check_prob("p", f64::NAN, true, true).is_err());
        assert_eq!(check_prob("p", 0.0, true, true), Ok(0.0));
    }

    #[test]
    fn positive_rejects_zero_and_nan() {
        assert!(check_positive("sigma", 0.0).is_err());
        assert!(check_positive("sigma", f64::INFINITY).is_err());
        assert_eq!(check_non_negative("lambda", 0.0), Ok(0.0));
    }
}
