//! # plotweave (the service)
//!
//! The `plotweave` binary turns live detection streams from surveillance sensors into tracks.
//! Sensors send detection batches over a WebSocket (`/v1/ingest`); the service checks each
//! batch, feeds it to the site's [`filter_core::tracker::Tracker`], and sends a track frame
//! per batch to every subscriber (`/v1/frames`). `plotweave batch` runs a recording through
//! the very same pipeline offline, byte-for-byte reproducibly. [`record`] writes recordings
//! from the live service and reads them back, [`replay`] sends one to another service,
//! [`scenario`] simulates traffic into a recording with its truth, and [`score`] measures
//! frames against that truth.
//!
//! The main type is [`server::AppState`] (one per site); the path of a batch is
//! [`wire::decode_batch`] → [`pipeline::Admission::admit`] → the engine thread
//! ([`pipeline::Engine`]) → [`wire::write_frame`] → broadcast.
//!
//! ```
//! use plotweave::config::Site;
//! use plotweave::pipeline::run_batch;
//!
//! let site = Site::demo(|_| None).unwrap();
//! let recording = r#"{"sensor":"north-mole-camera","seq":1,"time":1764600000.0,"detections":[{"x":10.0,"y":900.0}]}
//! {"sensor":"north-mole-camera","seq":1,"time":1764600001.0,"detections":[]}
//! {"sensor":"north-mole-camera","seq":2,"time":1764600001.0,"detections":[{"x":12.0,"y":901.0}]}
//! "#;
//! let (mut frames, mut report) = (Vec::new(), Vec::new());
//! let summary = run_batch(&site, recording.as_bytes(), &mut frames, &mut report).unwrap();
//! assert_eq!((summary.frames, summary.skipped), (2, 1));
//! assert!(String::from_utf8(report).unwrap().starts_with("line 2: batch seq 1"));
//! // A detection no track explains starts a candidate; on this sparse site its second
//! // detection makes it a track.
//! let last: serde_json::Value = serde_json::from_slice(frames.split(|b| *b == b'\n').nth(1).unwrap()).unwrap();
//! assert_eq!(last["tracks"][0]["id"], 1);
//! ```
//!
//! The one design choice to know: **the tracker is owned by one dedicated OS thread**, fed
//! through a bounded queue. Tracking is synchronous CPU work that must see scans in one order;
//! a thread of its own keeps it off the async runtime and makes that order explicit, and the
//! bounded queue turns overload into back-pressure on the sensors instead of memory growth
//! (see [`pipeline`]). **Only this crate knows HTTP, WebSocket and Prometheus;** the core
//! knows none of them, and wire types are converted by hand at the edge ([`wire`]).

#![deny(missing_docs)]

pub mod config;
pub mod demo;
pub mod echo;
pub mod error;
#[doc(hidden)]
pub mod fuzzing;
pub mod http;
pub mod keepalive;
pub mod metrics;
pub mod page;
pub mod pipeline;
pub mod record;
pub mod replay;
pub mod scenario;
pub mod score;
pub mod server;
pub mod snapshot;
pub mod wire;

/// Install the `tracing` subscriber: lines on standard error, text or JSON, level from
/// `RUST_LOG` (default `info`). Tokens are never logged (they are [`config::Secret`]s).
pub fn init_logging(json: bool) {
    let filter = tracing_subscriber::EnvFilter::try_from_default_env()
        .unwrap_or_else(|_| tracing_subscriber::EnvFilter::new("info"));
    let builder = tracing_subscriber::fmt()
        .with_env_filter(filter)
        .with_ansi(std::io::IsTerminal::is_terminal(&std::io::stderr()))
        .with_writer(std::io::stderr);
    if json {
        builder.json().init();
    } else {
        builder.init();
    }
}
