//! The crate's one error type, [`Error`], and [`Rejection`], the answer the service gives to a
//! client whose input broke a rule.
//!
//! A [`Rejection`] is a value of the wire contract: it carries a stable snake_case [`Code`] and a
//! message that names the batch (its `seq` when known), the field and the rule. It becomes the
//! `{"error": {...}}` reply on a WebSocket and the body of a 4xx HTTP answer. Bad client input is
//! never logged as a server error.

use std::fmt;

use axum::http::StatusCode;
use axum::response::{IntoResponse, Response};

/// Stable machine-readable reason of a [`Rejection`] (serialised in snake_case).
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, PartialOrd, Ord)]
#[non_exhaustive]
pub enum Code {
    /// The message is not valid JSON (includes `NaN`/`Infinity` literals, which JSON lacks).
    MalformedJson,
    /// A field is missing, has the wrong type, or does not fit the sensor's kind.
    Schema,
    /// A number is not finite (for example `1e999`, which overflows to infinity).
    NonFinite,
    /// A number is finite but outside its valid range (a negative range, a bearing of 360°).
    OutOfRange,
    /// The batch names a sensor the site does not configure.
    UnknownSensor,
    /// No valid credentials were presented.
    Unauthorized,
    /// The credentials are valid but do not allow this (a sensor's token sending for another).
    Forbidden,
    /// The batch's `seq` is not after the last accepted `seq` of its sensor.
    DuplicateSeq,
    /// The scan is older than the tracker's reorder window allows.
    LateScan,
    /// The message is larger than `server.limits.max_message_bytes`.
    TooLarge,
    /// The batch has more detections than `server.limits.max_detections`.
    TooManyDetections,
    /// The sensor sent more batches per second than `server.limits.max_batches_per_second`.
    RateLimited,
    /// A binary WebSocket message arrived where text JSON is required.
    BinaryFrame,
    /// `server.limits.max_connections` WebSocket connections are already open.
    TooManyConnections,
    /// The service is shutting down and accepts no more batches.
    ShuttingDown,
    /// A request parameter (query string, path, admin body) is invalid.
    BadRequest,
    /// The requested resource (track, sensor) does not exist.
    NotFound,
    /// Something failed inside the service; the message says what, without internals.
    Internal,
}

impl Code {
    /// The stable snake_case name used on the wire and as the `reason` metric label.
    pub fn as_str(self) -> &'static str {
        match self {
            Code::MalformedJson => "malformed_json",
            Code::Schema => "schema",
            Code::NonFinite => "non_finite",
            Code::OutOfRange => "out_of_range",
            Code::UnknownSensor => "unknown_sensor",
            Code::Unauthorized => "unauthorized",
            Code::Forbidden => "forbidden",
            Code::DuplicateSeq => "duplicate_seq",
            Code::LateScan => "late_scan",
            Code::TooLarge => "too_large",
            Code::TooManyDetections => "too_many_detections",
            Code::RateLimited => "rate_limited",
            Code::BinaryFrame => "binary_frame",
            Code::TooManyConnections => "too_many_connections",
            Code::ShuttingDown => "shutting_down",
            Code::BadRequest => "bad_request",
            Code::NotFound => "not_found",
            Code::Internal => "internal",
        }
    }

    /// The HTTP status that answers this code on the plain HTTP endpoints.
    pub fn status(self) -> StatusCode {
        match self {
            Code::Unauthorized => StatusCode::UNAUTHORIZED,
            Code::Forbidden => StatusCode::FORBIDDEN,
            Code::NotFound | Code::UnknownSensor => StatusCode::NOT_FOUND,
            Code::TooLarge => StatusCode::PAYLOAD_TOO_LARGE,
            Code::RateLimited => StatusCode::TOO_MANY_REQUESTS,
            Code::TooManyConnections | Code::ShuttingDown => StatusCode::SERVICE_UNAVAILABLE,
            Code::Internal => StatusCode::INTERNAL_SERVER_ERROR,
            _ => StatusCode::BAD_REQUEST,
        }
    }
}

impl fmt::Display for Code {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str(self.as_str())
    }
}

/// A refusal of client input: what rule was broken, in which batch, as the contract's
/// `{"error": {"seq": ..., "code": ..., "message": ...}}`.
#[derive(Debug, Clone, PartialEq)]
pub struct Rejection {
    /// Why.
    pub code: Code,
    /// The batch's `seq`, when it could be read.
    pub seq: Option<u64>,
    /// The whole user-facing message (names the batch, the field and the rule).
    pub message: String,
    /// Index of the configured sensor the input named, when known (for metric labels).
    pub sensor: Option<usize>,
}

impl Rejection {
    /// A rejection with `code` and a complete `message`.
    pub fn new(code: Code, seq: Option<u64>, message: impl Into<String>) -> Self {
        Self {
            code,
            seq,
            message: message.into(),
            sensor: None,
        }
    }

    /// The same rejection, attributed to configured sensor `index`.
    pub fn for_sensor(mut self, index: usize) -> Self {
        self.sensor = Some(index);
        self
    }

    /// The contract's error reply, `{"error": {"seq": N|null, "code": "...", "message": "..."}}`.
    pub fn to_json(&self) -> String {
        let body = serde_json::json!({
            "error": {"seq": self.seq, "code": self.code.as_str(), "message": self.message}
        });
        body.to_string()
    }
}

impl fmt::Display for Rejection {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        write!(f, "{} ({})", self.message, self.code)
    }
}

impl IntoResponse for Rejection {
    fn into_response(self) -> Response {
        let status = self.code.status();
        (
            status,
            [(axum::http::header::CONTENT_TYPE, "application/json")],
            self.to_json(),
        )
            .into_response()
    }
}

/// One problem found in a site configuration, named by its key path
/// (`sensor[1].detection_probability: must be in (0, 1], got 1.3`).
#[derive(Debug, Clone, PartialEq, Eq, PartialOrd, Ord)]
pub struct Problem {
    /// Key path, e.g. `sensor[1].detection_probability` or `server.limits.queue_depth`.
    pub path: String,
    /// The rule that was broken, with the offending value.
    pub message: String,
}

impl fmt::Display for Problem {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        write!(f, "{}: {}", self.path, self.message)
    }
}

/// The error type of the `plotweave` crate.
#[derive(Debug, thiserror::Error)]
#[non_exhaustive]
pub enum Error {
    /// The site configuration has problems; every one is listed, each named by its key path.
    #[error("{}", render_problems(.source_name, .problems))]
    Config {
        /// Where the configuration came from (file path or `embedded demo site`).
        source_name: String,
        /// Every problem found, in key order.
        problems: Vec<Problem>,
    },
    /// Reading or writing a file or socket failed.
    #[error("{context}: {source}")]
    Io {
        /// What was being done, naming the file or address.
        context: String,
        /// The operating system's error.
        #[source]
        source: std::io::Error,
    },
    /// The tracking core refused something (a parameter change, the tracker's construction).
    #[error("{context}: {source}")]
    Core {
        /// What was being done.
        context: String,
        /// The core's error, which names the parameter and the rule.
        #[source]
        source: filter_core::Error,
    },
    /// Client input was refused (wire batches, HTTP parameters).
    #[error("{0}")]
    Rejected(Rejection),
    /// A command-line choice is unsafe or contradictory (e.g. an open service on a public address).
    #[error("{0}")]
    Usage(String),
    /// The engine thread has stopped, so the request could not be served.
    #[error("the tracking engine has stopped")]
    EngineStopped,
    /// A snapshot file cannot be used to restore the picture.
    #[error(
        "snapshot {}: {message}; move the file away to start with an empty picture",
        path.display()
    )]
    Snapshot {
        /// The snapshot file.
        path: std::path::PathBuf,
        /// What is wrong with it.
        message: String,
    },
}

fn render_problems(source_name: &str, problems: &[Problem]) -> String {
    let mut out = format!(
        "{source_name}: {} problem{}",
        problems.len(),
        if problems.len() == 1 { "" } else { "s" }
    );
    for p in problems {
        out.push_str("\n  ");
        out.push_str(&p.to_string());
    }
    out
}

impl Error {
    /// Shorthand for an [`Error::Io`] with a context naming the file or address.
    pub fn io(context: impl Into<String>, source: std::io::Error) -> Self {
        Error::Io {
            context: context.into(),
            source,
        }
    }
}

impl From<Rejection> for Error {
    fn from(r: Rejection) -> Self {
        Error::Rejected(r)
    }
}

impl IntoResponse for Error {
    fn into_response(self) -> Response {
        match self {
            Error::Rejected(r) => r.into_response(),
            Error::Core { source, .. } => {
                Rejection::new(Code::BadRequest, None, source.to_string()).into_response()
            }
            Error::EngineStopped => {
                Rejection::new(Code::ShuttingDown, None, "the service is shutting down")
                    .into_response()
            }
            other => {
                tracing::error!(error = %other, "internal error while answering a request");
                Rejection::new(Code::Internal, None, "internal error; see the service log")
                    .into_response()
            }
        }
    }
}

/// The crate's result type.
pub type Result<T> = std::result::Result<T, Error>;

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn error_reply_has_the_contract_shape() {
        let r = Rejection::new(Code::DuplicateSeq, Some(4711), "batch seq 4711: repeated");
        let v: serde_json::Value = serde_json::from_str(&r.to_json()).unwrap();
        assert_eq!(v["error"]["seq"], 4711);
        assert_eq!(v["error"]["code"], "duplicate_seq");
        assert_eq!(v["error"]["message"], "batch seq 4711: repeated");
        let r = Rejection::new(Code::MalformedJson, None, "x");
        let v: serde_json::Value = serde_json::from_str(&r.to_json()).unwrap();
        assert!(v["error"]["seq"].is_null());
    }

    #[test]
    fn config_error_lists_every_problem() {
        let e = Error::Config {
            source_name: "site.toml".into(),
            problems: vec![
                Problem {
                    path: "a.b".into(),
                    message: "bad".into(),
                },
                Problem {
                    path: "c".into(),
                    message: "worse".into(),
                },
            ],
        };
        assert_eq!(
            e.to_string(),
            "site.toml: 2 problems\n  a.b: bad\n  c: worse"
        );
    }
}
