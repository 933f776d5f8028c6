//! The site configuration: TOML in, a validated [`Site`] out.
//!
//! Parsing is strict (unknown keys are errors) and validation collects **every** problem, each
//! named by its key path (`sensor[1].detection_probability: must be in (0, 1], got 1.3`), so a
//! broken file is fixed in one pass. Every key, its default, unit and valid range is documented
//! in `docs/configuration.md`. Tokens can be supplied (or overridden) by environment variables
//! so that they stay out of files: `PLOTWEAVE_TOKEN_<SENSOR_ID>` (upper-cased, `-` and `.`
//! become `_`), `PLOTWEAVE_READ_TOKEN` and `PLOTWEAVE_ADMIN_TOKEN`.

use std::fmt;
use std::net::SocketAddr;
use std::time::Duration;

use filter_core::tracker::{
    AssociationMethod, FieldOfView, Management, SensorConfig, SensorKind, TrackerConfig,
};
use serde::Deserialize;

use crate::error::{Error, Problem};

/// The embedded demo site ("Kestrel Bay", an invented harbour), used by `plotweave demo`.
pub const DEMO_SITE_TOML: &str = include_str!("demo_site.toml");

/// Default listen address (`HOST:PORT`) of the service.
pub const DEFAULT_LISTEN: &str = "127.0.0.1:8740";

/// A secret (bearer token). Its `Debug` and `Display` never show the value, so a token cannot
/// end up in a log line by accident.
#[derive(Clone, PartialEq, Eq)]
pub struct Secret(String);

impl Secret {
    /// Wrap a token value.
    pub fn new(value: impl Into<String>) -> Self {
        Secret(value.into())
    }

    /// The token's bytes, for constant-time comparison only.
    pub fn expose(&self) -> &[u8] {
        self.0.as_bytes()
    }
}

impl fmt::Debug for Secret {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str("Secret(***)")
    }
}

/// Limits of the live service; each one's doc says what happens when it is reached.
#[derive(Debug, Clone, PartialEq)]
pub struct Limits {
    /// Largest WebSocket message accepted, bytes (default 1 MiB). A larger message is answered
    /// with a `too_large` error and the connection is closed with code 1009, because the rest
    /// of that message cannot be skipped safely.
    pub max_message_bytes: usize,
    /// Most detections in one batch (default 10 000); more is refused with
    /// `too_many_detections`, the connection stays open.
    pub max_detections: usize,
    /// Batches per second per sensor (token bucket of one second's burst; default 50). Excess
    /// batches are refused with `rate_limited` and not used; the connection stays open.
    pub max_batches_per_second: f64,
    /// Open WebSocket connections (ingest and frames together; default 256). Further upgrade
    /// requests are answered `503 too_many_connections`.
    pub max_connections: usize,
    /// Capacity of the engine's input queue, batches (default 64). When it is full the ingest
    /// connection waits for room before it reads its next message (back-pressure to the
    /// sensor); nothing is dropped.
    pub queue_depth: usize,
    /// Frames buffered per frame subscriber (default 256). A subscriber that falls further
    /// behind skips the oldest frames and is sent `{"skipped": N}`; it never slows the engine.
    pub frame_buffer: usize,
    /// How far ahead of the server's clock a live batch's `time` may be, seconds (default 300;
    /// 0 turns the check off). A batch stamped further ahead would move the picture into the
    /// future and make every later batch `late_scan`, so it is refused with `out_of_range`.
    /// Recordings of the past (staging replays) are never affected; `batch` does not check.
    pub max_time_ahead: f64,
    /// Seconds between the WebSocket Pings the server sends on every ingest, frames and
    /// detections connection (default 15; 0 = send none). A live peer's WebSocket layer
    /// answers each with a Pong, which is what tells a quiet consumer from a dead one.
    pub ping_interval: f64,
    /// Seconds the server listens on a WebSocket connection without receiving anything (no
    /// Pong, no message) before it closes it as dead (default 30; 0 = never). Counted in
    /// `plotweave_connections_closed_total{reason="idle_timeout"}`; a send the peer does not
    /// take within this time closes it too (`reason="send_timeout"`). Time an ingest
    /// connection spends paused by back-pressure does not count (see
    /// [`crate::keepalive`]). At least twice `ping_interval` when both are set.
    pub idle_timeout: f64,
}

impl Default for Limits {
    fn default() -> Self {
        Limits {
            max_message_bytes: 1 << 20,
            max_detections: 10_000,
            max_batches_per_second: 50.0,
            max_connections: 256,
            queue_depth: 64,
            frame_buffer: 256,
            max_time_ahead: 300.0,
            ping_interval: 15.0,
            idle_timeout: 30.0,
        }
    }
}

/// The `[server]` section.
#[derive(Debug, Clone, PartialEq)]
pub struct ServerConfig {
    /// Listen address (default `127.0.0.1:8740`; `--listen` overrides it).
    pub listen: SocketAddr,
    /// Token that `/v1/frames` and `/v1/tracks*`, `/v1/sensors` require; `None` = open.
    pub read_token: Option<Secret>,
    /// Token that `/v1/admin/*` requires; `None` = admin is open (loopback only).
    pub admin_token: Option<Secret>,
    /// Limits.
    pub limits: Limits,
    /// How long a graceful shutdown may take before the process exits anyway (default 10 s).
    pub shutdown_timeout: Duration,
    /// `[server.recording]` when enabled: accepted batches are written there before the ack.
    pub recording: Option<crate::record::RecordingConfig>,
    /// `[server.snapshot]` when enabled: the tracker's state is saved there periodically and
    /// restored at start, with the recording since (see `crate::snapshot`).
    pub snapshot: Option<crate::snapshot::SnapshotConfig>,
}

/// What the service needs to know about a sensor beyond the core's [`SensorConfig`].
#[derive(Debug, Clone, PartialEq)]
pub struct SensorExtra {
    /// The sensor's ingest token; `None` = any client may send for it (loopback only).
    pub token: Option<Secret>,
    /// Nominal scan period, s (optional; needed by the demo simulator).
    pub period: Option<f64>,
}

/// A validated site: everything the service and the batch run need.
#[derive(Debug, Clone, PartialEq)]
pub struct Site {
    /// Site name.
    pub name: String,
    /// Optional geodetic origin of the site frame, degrees (latitude, longitude); informational.
    pub origin: Option<(f64, f64)>,
    /// Tracker parameters.
    pub tracker: TrackerConfig,
    /// Sensors, in configuration order (the index is the core's sensor index).
    pub sensors: Vec<SensorConfig>,
    /// Per-sensor service settings, parallel to `sensors`.
    pub sensor_extra: Vec<SensorExtra>,
    /// Server settings.
    pub server: ServerConfig,
}

impl Site {
    /// Sensor ids in index order.
    pub fn sensor_ids(&self) -> Vec<String> {
        self.sensors.iter().map(|s| s.id.clone()).collect()
    }

    /// The embedded demo site (tokens from the environment still apply).
    pub fn demo(env: impl Fn(&str) -> Option<String>) -> Result<Site, Error> {
        parse(DEMO_SITE_TOML, "embedded demo site", env)
    }

    /// Read and validate the site file at `path`, with tokens from the process environment.
    pub fn load(path: &std::path::Path) -> Result<Site, Error> {
        let text = std::fs::read_to_string(path)
            .map_err(|e| Error::io(format!("cannot read config {}", path.display()), e))?;
        parse(&text, &path.display().to_string(), |k| {
            std::env::var(k).ok()
        })
    }

    /// Whether any part of the service accepts requests without a token, listed for the
    /// message that refuses a non-loopback listen address without `--allow-open`.
    pub fn open_surfaces(&self) -> Vec<String> {
        let mut open: Vec<String> = self
            .sensors
            .iter()
            .zip(&self.sensor_extra)
            .filter(|(_, e)| e.token.is_none())
            .map(|(s, _)| format!("ingest for sensor {:?} (no token)", s.id))
            .collect();
        if self.server.admin_token.is_none() {
            open.push("admin (no server.admin_token)".to_string());
        }
        open
    }
}

/// The environment variable that overrides sensor `id`'s token.
pub fn token_env_var(id: &str) -> String {
    let mut v = String::from("PLOTWEAVE_TOKEN_");
    v.extend(id.chars().map(|c| match c {
        '-' | '.' => '_',
        c => c.to_ascii_uppercase(),
    }));
    v
}

// ---- raw TOML shapes (serde, strict) ------------------------------------------------------

#[derive(Debug, Deserialize, Default)]
#[serde(deny_unknown_fields)]
struct RawSite {
    name: Option<String>,
    origin: Option<RawOrigin>,
}

#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields)]
struct RawOrigin {
    lat: f64,
    lon: f64,
}

#[derive(Debug, Deserialize, Default)]
#[serde(deny_unknown_fields)]
struct RawTracker {
    association: Option<String>,
    max_exact_hypotheses: Option<i64>,
    k_best: Option<i64>,
    gate_probability: Option<f64>,
    process_noise: Option<f64>,
    reorder_window: Option<f64>,
    max_position_std: Option<f64>,
    initial_velocity_std: Option<f64>,
    survival_probability: Option<f64>,
    health_window: Option<i64>,
    management: Option<RawManagement>,
}

#[derive(Debug, Deserialize, Default)]
#[serde(deny_unknown_fields)]
struct RawManagement {
    method: Option<String>,
    confirm: Option<f64>,
    delete: Option<f64>,
    m: Option<i64>,
    n: Option<i64>,
    max_misses: Option<i64>,
}

#[derive(Debug, Deserialize, Default)]
#[serde(deny_unknown_fields)]
struct RawSensor {
    id: Option<String>,
    kind: Option<String>,
    position: Option<RawXY>,
    noise: Option<RawNoise>,
    fov: Option<RawFov>,
    detection_probability: Option<f64>,
    clutter_rate: Option<f64>,
    birth_rate: Option<f64>,
    period: Option<f64>,
    token: Option<String>,
}

#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields)]
struct RawXY {
    x: f64,
    y: f64,
}

#[derive(Debug, Deserialize, Default)]
#[serde(deny_unknown_fields)]
struct RawNoise {
    sigma: Option<f64>,
    range: Option<f64>,
    bearing_deg: Option<f64>,
    range_rate: Option<f64>,
}

#[derive(Debug, Deserialize, Default)]
#[serde(deny_unknown_fields)]
struct RawFov {
    x_min: Option<f64>,
    x_max: Option<f64>,
    y_min: Option<f64>,
    y_max: Option<f64>,
    min_range: Option<f64>,
    max_range: Option<f64>,
    bearing_start_deg: Option<f64>,
    bearing_extent_deg: Option<f64>,
}

#[derive(Debug, Deserialize, Default)]
#[serde(deny_unknown_fields)]
struct RawServer {
    listen: Option<String>,
    read_token: Option<String>,
    admin_token: Option<String>,
    shutdown_timeout: Option<f64>,
    limits: Option<RawLimits>,
    recording: Option<RawRecording>,
    snapshot: Option<RawSnapshot>,
}

#[derive(Debug, Deserialize, Default)]
#[serde(deny_unknown_fields)]
struct RawLimits {
    max_message_bytes: Option<i64>,
    max_detections: Option<i64>,
    max_batches_per_second: Option<f64>,
    max_connections: Option<i64>,
    queue_depth: Option<i64>,
    frame_buffer: Option<i64>,
    max_time_ahead: Option<f64>,
    ping_interval: Option<f64>,
    idle_timeout: Option<f64>,
}

#[derive(Debug, Deserialize, Default)]
#[serde(deny_unknown_fields)]
struct RawRecording {
    enabled: Option<bool>,
    directory: Option<String>,
    rotate_bytes: Option<i64>,
    rotate_seconds: Option<f64>,
    sync: Option<String>,
    sync_interval_ms: Option<i64>,
}

#[derive(Debug, Deserialize, Default)]
#[serde(deny_unknown_fields)]
struct RawSnapshot {
    enabled: Option<bool>,
    path: Option<String>,
    interval: Option<f64>,
}

// ---- validation ---------------------------------------------------------------------------

/// Collects problems while the configuration is read.
#[derive(Default)]
struct Problems(Vec<Problem>);

impl Problems {
    fn add(&mut self, path: impl Into<String>, message: impl Into<String>) {
        self.0.push(Problem {
            path: path.into(),
            message: message.into(),
        });
    }

    /// Deserialise `value` as `T`; on failure record the problem under `path` (extended by the
    /// path inside `value` where serde found it) and return `None`.
    fn section<T: for<'de> Deserialize<'de>>(
        &mut self,
        path: &str,
        value: toml::Value,
    ) -> Option<T> {
        match deserialize_section(path, value) {
            Ok(v) => Some(v),
            Err((full, message)) => {
                self.add(full, message);
                None
            }
        }
    }

    fn required<T>(&mut self, path: &str, v: Option<T>, what: &str) -> Option<T> {
        if v.is_none() {
            self.add(path, format!("required ({what})"));
        }
        v
    }

    /// `v` finite and > 0.
    fn positive(&mut self, path: &str, v: f64, unit: &str) -> f64 {
        if !(v.is_finite() && v > 0.0) {
            self.add(path, format!("must be finite and > 0{unit}, got {v}"));
        }
        v
    }

    /// `v` finite and ≥ 0.
    fn non_negative(&mut self, path: &str, v: f64, unit: &str) -> f64 {
        if !(v.is_finite() && v >= 0.0) {
            self.add(path, format!("must be finite and >= 0{unit}, got {v}"));
        }
        v
    }

    fn finite(&mut self, path: &str, v: f64) -> f64 {
        if !v.is_finite() {
            self.add(path, format!("must be finite, got {v}"));
        }
        v
    }

    /// `v` in the interval written as `lo_open`/`hi_open`.
    fn prob(&mut self, path: &str, v: f64, zero_ok: bool, one_ok: bool) -> f64 {
        let lo = if zero_ok { v >= 0.0 } else { v > 0.0 };
        let hi = if one_ok { v <= 1.0 } else { v < 1.0 };
        if !(v.is_finite() && lo && hi) {
            self.add(
                path,
                format!(
                    "must be in {}0, 1{}, got {v}",
                    if zero_ok { "[" } else { "(" },
                    if one_ok { "]" } else { ")" }
                ),
            );
        }
        v
    }

    /// An integer in `[min, max]`, as usize.
    fn int(&mut self, path: &str, v: i64, min: i64, max: i64) -> usize {
        if v < min || v > max {
            self.add(
                path,
                format!("must be an integer in [{min}, {max}], got {v}"),
            );
            return min.max(0) as usize;
        }
        v as usize
    }
}

/// `key` as a key path names it: bare when TOML allows it bare (`A-Z a-z 0-9 _ -`), otherwise
/// quoted with escapes, so that an empty key or one with a dot or a newline is still visible
/// (the `site_config` fuzz target found `"" = 1` reported under an empty path).
fn key_in_path(key: &str) -> String {
    if !key.is_empty()
        && key
            .chars()
            .all(|c| c.is_ascii_alphanumeric() || c == '_' || c == '-')
    {
        key.to_string()
    } else {
        format!("{key:?}")
    }
}

fn valid_id(id: &str) -> bool {
    !id.is_empty()
        && id.len() <= 64
        && id
            .chars()
            .all(|c| c.is_ascii_alphanumeric() || c == '-' || c == '_' || c == '.')
}

/// Minimum token length, characters (common practice: a bearer token should carry at least
/// ~96 bits of randomness; 16 random base64 characters carry 96).
pub const MIN_TOKEN_LEN: usize = 16;

fn check_token(p: &mut Problems, path: &str, source: &str, token: &str) {
    if token.len() < MIN_TOKEN_LEN {
        p.add(
            path,
            format!(
                "token{source} must be at least {MIN_TOKEN_LEN} characters, got {}",
                token.len()
            ),
        );
    }
    if token.chars().any(|c| c.is_whitespace() || c.is_control()) {
        p.add(
            path,
            format!("token{source} must not contain whitespace or control characters"),
        );
    }
}

/// Take `key` out of `table`.
fn take(table: &mut toml::Table, key: &str) -> Option<toml::Value> {
    table.remove(key)
}

/// Parse and validate a site configuration. `source_name` names it in messages; `env` looks up
/// environment variables (token overrides).
pub fn parse(
    text: &str,
    source_name: &str,
    env: impl Fn(&str) -> Option<String>,
) -> Result<Site, Error> {
    let mut p = Problems::default();
    let mut doc: toml::Table = match text.parse::<toml::Table>() {
        Ok(t) => t,
        Err(e) => {
            p.add("(toml syntax)", e.to_string().trim().to_string());
            return Err(Error::Config {
                source_name: source_name.to_string(),
                problems: p.0,
            });
        }
    };
    let (site_ok, raw_site): (bool, RawSite) = match take(&mut doc, "site") {
        Some(v) => p
            .section("site", v)
            .map_or((false, RawSite::default()), |s| (true, s)),
        None => (true, RawSite::default()),
    };
    let raw_tracker: RawTracker = take(&mut doc, "tracker")
        .and_then(|v| p.section("tracker", v))
        .unwrap_or_default();
    let raw_server: RawServer = take(&mut doc, "server")
        .and_then(|v| p.section("server", v))
        .unwrap_or_default();
    let raw_sensors: Vec<Option<RawSensor>> = match take(&mut doc, "sensor") {
        Some(toml::Value::Array(items)) => items
            .into_iter()
            .enumerate()
            .map(|(i, v)| p.section(&format!("sensor[{i}]"), v))
            .collect(),
        Some(_) => {
            p.add(
                "sensor",
                "must be an array of tables, written [[sensor]] once per sensor",
            );
            Vec::new()
        }
        None => Vec::new(),
    };
    for key in doc.keys() {
        p.add(
            key_in_path(key),
            "unknown key (known top-level keys: site, tracker, sensor, server)",
        );
    }

    let name = if site_ok {
        p.required("site.name", raw_site.name, "the site's name")
            .unwrap_or_default()
    } else {
        String::new()
    };
    if site_ok && !name.is_empty() && name.trim().is_empty() {
        p.add("site.name", "must not be blank");
    }
    let origin = raw_site.origin.map(|o| {
        if !(o.lat.is_finite() && (-90.0..=90.0).contains(&o.lat)) {
            p.add(
                "site.origin.lat",
                format!("must be in [-90, 90] degrees, got {}", o.lat),
            );
        }
        if !(o.lon.is_finite() && (-180.0..=180.0).contains(&o.lon)) {
            p.add(
                "site.origin.lon",
                format!("must be in [-180, 180] degrees, got {}", o.lon),
            );
        }
        (o.lat, o.lon)
    });

    let tracker = tracker_config(&mut p, raw_tracker);

    if raw_sensors.is_empty() {
        p.add("sensor", "at least one [[sensor]] is required");
    }
    let mut sensors = Vec::new();
    let mut extras = Vec::new();
    for (i, raw) in raw_sensors.into_iter().enumerate() {
        let Some(raw) = raw else { continue };
        if let Some((s, e)) = sensor_config(&mut p, i, raw, &env) {
            sensors.push(s);
            extras.push(e);
        }
    }
    for (i, s) in sensors.iter().enumerate() {
        if let Some(j) = sensors[..i].iter().position(|o| o.id == s.id) {
            p.add(
                format!("sensor[{i}].id"),
                format!("{:?} is already the id of sensor[{j}]", s.id),
            );
        }
    }

    let server = server_config(&mut p, raw_server, &env);

    // A token must name exactly one role.
    let mut tokens: Vec<(String, &Secret)> = Vec::new();
    for (i, e) in extras.iter().enumerate() {
        if let Some(t) = &e.token {
            tokens.push((format!("sensor[{i}].token"), t));
        }
    }
    if let Some(t) = &server.read_token {
        tokens.push(("server.read_token".into(), t));
    }
    if let Some(t) = &server.admin_token {
        tokens.push(("server.admin_token".into(), t));
    }
    for (i, (path, t)) in tokens.iter().enumerate() {
        if let Some((other, _)) = tokens[..i].iter().find(|(_, o)| o == t) {
            p.add(
                path.clone(),
                format!("must differ from {other}: a token names exactly one role"),
            );
        }
    }

    if !p.0.is_empty() {
        return Err(Error::Config {
            source_name: source_name.to_string(),
            problems: p.0,
        });
    }
    Ok(Site {
        name,
        origin,
        tracker,
        sensors,
        sensor_extra: extras,
        server,
    })
}

fn tracker_config(p: &mut Problems, raw: RawTracker) -> TrackerConfig {
    let mut c = TrackerConfig::default();
    let (default_exact, default_k) = match c.association {
        AssociationMethod::Jpda {
            max_exact_hypotheses,
            k_best,
        } => (max_exact_hypotheses, k_best),
        AssociationMethod::Gnn => (DEFAULT_MAX_EXACT_HYPOTHESES, DEFAULT_K_BEST),
    };
    let association = raw.association.as_deref().unwrap_or(match c.association {
        AssociationMethod::Gnn => "gnn",
        AssociationMethod::Jpda { .. } => "jpda",
    });
    match association {
        "gnn" => {
            for (key, v) in [
                ("max_exact_hypotheses", raw.max_exact_hypotheses),
                ("k_best", raw.k_best),
            ] {
                if v.is_some() {
                    p.add(
                        format!("tracker.{key}"),
                        "only used with association = \"jpda\"",
                    );
                }
            }
            c.association = AssociationMethod::Gnn;
        }
        "jpda" => {
            let max_exact_hypotheses = raw.max_exact_hypotheses.map_or(default_exact, |v| {
                p.int("tracker.max_exact_hypotheses", v, 1, 100_000_000)
            });
            let k_best = raw
                .k_best
                .map_or(default_k, |v| p.int("tracker.k_best", v, 1, 100_000));
            c.association = AssociationMethod::Jpda {
                max_exact_hypotheses,
                k_best,
            };
        }
        other => p.add(
            "tracker.association",
            format!("must be \"gnn\" or \"jpda\", got {other:?}"),
        ),
    }
    if let Some(v) = raw.gate_probability {
        c.gate_probability = p.prob("tracker.gate_probability", v, false, false);
    }
    if let Some(v) = raw.process_noise {
        c.process_noise = p.non_negative("tracker.process_noise", v, " m²/s³");
    }
    if let Some(v) = raw.reorder_window {
        c.reorder_window = p.non_negative("tracker.reorder_window", v, " s");
    }
    if let Some(v) = raw.max_position_std {
        c.max_position_std = p.positive("tracker.max_position_std", v, " m");
    }
    if let Some(v) = raw.initial_velocity_std {
        c.initial_velocity_std = p.positive("tracker.initial_velocity_std", v, " m/s");
    }
    if let Some(v) = raw.survival_probability {
        c.survival_probability = p.prob("tracker.survival_probability", v, false, true);
    }
    if let Some(v) = raw.health_window {
        c.health_window = p.int("tracker.health_window", v, 1, 1_000_000);
    }
    if let Some(m) = raw.management {
        c.management = management(p, m, c.management);
    }
    // The core's own check guards anything the key-by-key checks above do not cover.
    if p.0.iter().all(|x| !x.path.starts_with("tracker"))
        && let Err(e) = c.validate()
    {
        p.add("tracker", e.to_string());
    }
    c
}

/// Defaults used for JPDA limits when the core's default association is GNN.
const DEFAULT_MAX_EXACT_HYPOTHESES: usize = 10_000;
/// See [`DEFAULT_MAX_EXACT_HYPOTHESES`].
const DEFAULT_K_BEST: usize = 100;

fn management(p: &mut Problems, m: RawManagement, default: Management) -> Management {
    let method = m.method.as_deref().unwrap_or(match default {
        Management::Existence { .. } => "existence",
        Management::MOfN { .. } => "m_of_n",
    });
    let path = "tracker.management";
    let unused = |p: &mut Problems, keys: &[(&str, bool)], method: &str| {
        for (k, present) in keys {
            if *present {
                p.add(
                    format!("{path}.{k}"),
                    format!("not used with method = {method:?}"),
                );
            }
        }
    };
    match method {
        "existence" => {
            unused(
                p,
                &[
                    ("m", m.m.is_some()),
                    ("n", m.n.is_some()),
                    ("max_misses", m.max_misses.is_some()),
                ],
                method,
            );
            let (dc, dd) = match default {
                Management::Existence { confirm, delete } => (confirm, delete),
                Management::MOfN { .. } => (0.9, 1e-3),
            };
            let confirm = m
                .confirm
                .map_or(dc, |v| p.prob(&format!("{path}.confirm"), v, false, false));
            let delete = m
                .delete
                .map_or(dd, |v| p.prob(&format!("{path}.delete"), v, false, false));
            if delete >= confirm {
                p.add(
                    format!("{path}.delete"),
                    format!("must be below confirm ({confirm}), got {delete}"),
                );
            }
            Management::Existence { confirm, delete }
        }
        "m_of_n" => {
            unused(
                p,
                &[
                    ("confirm", m.confirm.is_some()),
                    ("delete", m.delete.is_some()),
                ],
                method,
            );
            let (dm, dn, dx) = match default {
                Management::MOfN { m, n, max_misses } => (m, n, max_misses),
                Management::Existence { .. } => (3, 5, 3),
            };
            let mm =
                m.m.map_or(dm, |v| p.int(&format!("{path}.m"), v, 1, 32) as u32);
            let nn =
                m.n.map_or(dn, |v| p.int(&format!("{path}.n"), v, 1, 32) as u32);
            let mx = m.max_misses.map_or(dx, |v| {
                p.int(&format!("{path}.max_misses"), v, 1, 1000) as u32
            });
            if mm > nn {
                p.add(
                    format!("{path}.m"),
                    format!("must be <= n ({nn}), got {mm}"),
                );
            }
            Management::MOfN {
                m: mm,
                n: nn,
                max_misses: mx,
            }
        }
        other => {
            p.add(
                format!("{path}.method"),
                format!("must be \"existence\" or \"m_of_n\", got {other:?}"),
            );
            default
        }
    }
}

fn sensor_config(
    p: &mut Problems,
    i: usize,
    raw: RawSensor,
    env: &impl Fn(&str) -> Option<String>,
) -> Option<(SensorConfig, SensorExtra)> {
    let at = |k: &str| format!("sensor[{i}].{k}");
    let before = p.0.len();
    let id = p
        .required(&at("id"), raw.id, "the sensor's id, as batches name it")
        .unwrap_or_default();
    if !id.is_empty() && !valid_id(&id) {
        p.add(
            at("id"),
            format!(
                "must be 1 to 64 characters of A-Z a-z 0-9 - _ . (it names the sensor in URLs, metrics and environment variables), got {id:?}"
            ),
        );
    }
    let kind = p
        .required(&at("kind"), raw.kind, "\"cartesian\" or \"polar\"")
        .unwrap_or_default();
    let noise = p
        .required(
            &at("noise"),
            raw.noise,
            "measurement noise standard deviations",
        )
        .unwrap_or_default();
    let fov = p
        .required(&at("fov"), raw.fov, "the field of view")
        .unwrap_or_default();
    let pd = p.required(
        &at("detection_probability"),
        raw.detection_probability,
        "P_D in (0, 1]",
    );
    let pd = pd.map_or(1.0, |v| {
        p.prob(&at("detection_probability"), v, false, true)
    });
    let clutter = p.required(
        &at("clutter_rate"),
        raw.clutter_rate,
        "mean false detections per scan over the field of view",
    );
    let clutter = clutter.map_or(0.0, |v| p.non_negative(&at("clutter_rate"), v, " per scan"));
    let birth = p.required(
        &at("birth_rate"),
        raw.birth_rate,
        "expected new objects per scan over the field of view",
    );
    let birth = birth.map_or(1.0, |v| p.positive(&at("birth_rate"), v, " per scan"));
    let period = raw.period.map(|v| p.positive(&at("period"), v, " s"));

    let sensor_kind;
    let field_of_view;
    match kind.as_str() {
        "cartesian" => {
            if raw.position.is_some() {
                p.add(
                    at("position"),
                    "not used by a cartesian sensor (its detections are already in the site frame)",
                );
            }
            for (k, present) in [
                ("range", noise.range.is_some()),
                ("bearing_deg", noise.bearing_deg.is_some()),
                ("range_rate", noise.range_rate.is_some()),
            ] {
                if present {
                    p.add(
                        at(&format!("noise.{k}")),
                        "polar noise key on a cartesian sensor (use noise.sigma)",
                    );
                }
            }
            let sigma = p
                .required(
                    &at("noise.sigma"),
                    noise.sigma,
                    "position noise std per axis, m",
                )
                .map_or(1.0, |v| p.positive(&at("noise.sigma"), v, " m"));
            sensor_kind = SensorKind::Cartesian { sigma };
            for (k, present) in [
                ("min_range", fov.min_range.is_some()),
                ("max_range", fov.max_range.is_some()),
                ("bearing_start_deg", fov.bearing_start_deg.is_some()),
                ("bearing_extent_deg", fov.bearing_extent_deg.is_some()),
            ] {
                if present {
                    p.add(
                        at(&format!("fov.{k}")),
                        "sector key on a cartesian sensor (its fov is x_min, x_max, y_min, y_max)",
                    );
                }
            }
            let mut edge = |k: &str, v: Option<f64>| {
                p.required(&at(&format!("fov.{k}")), v, "site-frame edge, m")
                    .map_or(0.0, |v| p.finite(&at(&format!("fov.{k}")), v))
            };
            let (x_min, x_max) = (edge("x_min", fov.x_min), edge("x_max", fov.x_max));
            let (y_min, y_max) = (edge("y_min", fov.y_min), edge("y_max", fov.y_max));
            if fov.x_min.is_some() && fov.x_max.is_some() && x_min >= x_max {
                p.add(
                    at("fov.x_max"),
                    format!("must be greater than fov.x_min ({x_min}), got {x_max}"),
                );
            }
            if fov.y_min.is_some() && fov.y_max.is_some() && y_min >= y_max {
                p.add(
                    at("fov.y_max"),
                    format!("must be greater than fov.y_min ({y_min}), got {y_max}"),
                );
            }
            field_of_view = FieldOfView::Rect {
                x_min,
                x_max,
                y_min,
                y_max,
            };
        }
        "polar" => {
            let pos = p.required(
                &at("position"),
                raw.position,
                "the sensor's position {x, y} in the site frame, m",
            );
            let (x, y) = pos.map_or((0.0, 0.0), |xy| {
                (
                    p.finite(&at("position.x"), xy.x),
                    p.finite(&at("position.y"), xy.y),
                )
            });
            if noise.sigma.is_some() {
                p.add(
                    at("noise.sigma"),
                    "cartesian noise key on a polar sensor (use noise.range and noise.bearing_deg)",
                );
            }
            let sigma_range = p
                .required(&at("noise.range"), noise.range, "range noise std, m")
                .map_or(1.0, |v| p.positive(&at("noise.range"), v, " m"));
            let sigma_bearing_deg = p
                .required(
                    &at("noise.bearing_deg"),
                    noise.bearing_deg,
                    "bearing noise std, degrees",
                )
                .map_or(1.0, |v| p.positive(&at("noise.bearing_deg"), v, " degrees"));
            let sigma_range_rate = noise
                .range_rate
                .map(|v| p.positive(&at("noise.range_rate"), v, " m/s"));
            sensor_kind = SensorKind::Polar {
                x,
                y,
                sigma_range,
                sigma_bearing_deg,
                sigma_range_rate,
            };
            for (k, present) in [
                ("x_min", fov.x_min.is_some()),
                ("x_max", fov.x_max.is_some()),
                ("y_min", fov.y_min.is_some()),
                ("y_max", fov.y_max.is_some()),
            ] {
                if present {
                    p.add(
                        at(&format!("fov.{k}")),
                        "rectangle key on a polar sensor (its fov is min_range, max_range, bearing_start_deg, bearing_extent_deg)",
                    );
                }
            }
            let min_range = fov
                .min_range
                .map_or(0.0, |v| p.non_negative(&at("fov.min_range"), v, " m"));
            let max_range = p
                .required(&at("fov.max_range"), fov.max_range, "instrumented range, m")
                .map_or(1.0, |v| p.positive(&at("fov.max_range"), v, " m"));
            if fov.max_range.is_some() && max_range <= min_range {
                p.add(
                    at("fov.max_range"),
                    format!("must be greater than fov.min_range ({min_range}), got {max_range}"),
                );
            }
            let bearing_start_deg = fov.bearing_start_deg.map_or(0.0, |v| {
                if !(v.is_finite() && (0.0..360.0).contains(&v)) {
                    p.add(
                        at("fov.bearing_start_deg"),
                        format!("must be in [0, 360) degrees, got {v}"),
                    );
                }
                v
            });
            let bearing_extent_deg = fov.bearing_extent_deg.map_or(360.0, |v| {
                if !(v.is_finite() && v > 0.0 && v <= 360.0) {
                    p.add(
                        at("fov.bearing_extent_deg"),
                        format!("must be in (0, 360] degrees, got {v}"),
                    );
                }
                v
            });
            field_of_view = FieldOfView::Sector {
                min_range,
                max_range,
                bearing_start_deg,
                bearing_extent_deg,
            };
        }
        "" => return None,
        other => {
            p.add(
                at("kind"),
                format!("must be \"cartesian\" or \"polar\", got {other:?}"),
            );
            return None;
        }
    }

    let var = token_env_var(&id);
    let (token, source) = match env(&var) {
        Some(t) => (Some(t), format!(" (from {var})")),
        None => (raw.token, String::new()),
    };
    if let Some(t) = &token {
        check_token(p, &at("token"), &source, t);
    }
    let config = SensorConfig {
        id,
        kind: sensor_kind,
        fov: field_of_view,
        detection_probability: pd,
        clutter_rate: clutter,
        birth_rate: birth,
    };
    // The core's own check guards anything the key-by-key checks above do not cover.
    if p.0.len() == before
        && let Err(e) = config.validate()
    {
        p.add(format!("sensor[{i}]"), e.to_string());
    }
    Some((
        config,
        SensorExtra {
            token: token.map(Secret::new),
            period,
        },
    ))
}

fn server_config(
    p: &mut Problems,
    raw: RawServer,
    env: &impl Fn(&str) -> Option<String>,
) -> ServerConfig {
    let listen_text = raw.listen.unwrap_or_else(|| DEFAULT_LISTEN.to_string());
    let listen = match listen_text.parse::<SocketAddr>() {
        Ok(a) => a,
        Err(_) => {
            p.add(
                "server.listen",
                format!("must be HOST:PORT with a numeric IP host, e.g. 127.0.0.1:8740, got {listen_text:?}"),
            );
            SocketAddr::from(([127, 0, 0, 1], 8740))
        }
    };
    let mut token = |key: &str, var: &str, value: Option<String>| -> Option<Secret> {
        let (t, source) = match env(var) {
            Some(t) => (Some(t), format!(" (from {var})")),
            None => (value, String::new()),
        };
        if let Some(t) = &t {
            check_token(p, &format!("server.{key}"), &source, t);
        }
        t.map(Secret::new)
    };
    let read_token = token("read_token", "PLOTWEAVE_READ_TOKEN", raw.read_token);
    let admin_token = token("admin_token", "PLOTWEAVE_ADMIN_TOKEN", raw.admin_token);
    let shutdown_timeout = raw.shutdown_timeout.map_or(10.0, |v| {
        if !(v.is_finite() && v > 0.0 && v <= 3600.0) {
            p.add(
                "server.shutdown_timeout",
                format!("must be in (0, 3600] s, got {v}"),
            );
            10.0
        } else {
            v
        }
    });
    let mut limits = Limits::default();
    if let Some(l) = raw.limits {
        let at = |k: &str| format!("server.limits.{k}");
        if let Some(v) = l.max_message_bytes {
            limits.max_message_bytes = p.int(&at("max_message_bytes"), v, 256, 1 << 30);
        }
        if let Some(v) = l.max_detections {
            limits.max_detections = p.int(&at("max_detections"), v, 1, 10_000_000);
        }
        if let Some(v) = l.max_batches_per_second {
            limits.max_batches_per_second =
                p.positive(&at("max_batches_per_second"), v, " batches/s");
        }
        if let Some(v) = l.max_connections {
            limits.max_connections = p.int(&at("max_connections"), v, 1, 1_000_000);
        }
        if let Some(v) = l.queue_depth {
            limits.queue_depth = p.int(&at("queue_depth"), v, 1, 1_000_000);
        }
        if let Some(v) = l.frame_buffer {
            limits.frame_buffer = p.int(&at("frame_buffer"), v, 1, 1_000_000);
        }
        if let Some(v) = l.max_time_ahead {
            limits.max_time_ahead = p.non_negative(&at("max_time_ahead"), v, " s");
        }
        let mut keepalive_ok = true;
        for (key, value, max, slot) in [
            (
                "ping_interval",
                l.ping_interval,
                3600.0,
                &mut limits.ping_interval,
            ),
            (
                "idle_timeout",
                l.idle_timeout,
                86_400.0,
                &mut limits.idle_timeout,
            ),
        ] {
            if let Some(v) = value {
                if v.is_finite() && (0.0..=max).contains(&v) {
                    *slot = v;
                } else {
                    p.add(
                        at(key),
                        format!("must be in [0, {max}] s (0 turns it off), got {v}"),
                    );
                    keepalive_ok = false;
                }
            }
        }
        let (ping, idle) = (limits.ping_interval, limits.idle_timeout);
        let given = |v: Option<f64>| if v.is_some() { "" } else { " (the default)" };
        if keepalive_ok && idle > 0.0 && ping == 0.0 {
            p.add(
                at("idle_timeout"),
                format!(
                    "is {idle} s{} but server.limits.ping_interval is 0: without pings a consumer that only listens says nothing and would be closed; set a ping_interval or idle_timeout = 0",
                    given(l.idle_timeout)
                ),
            );
        } else if keepalive_ok && idle > 0.0 && idle < 2.0 * ping {
            p.add(
                at("idle_timeout"),
                format!(
                    "must be at least twice server.limits.ping_interval (2 × {ping} s = {} s) so that a live peer's pong arrives in time, got {idle} s{}",
                    2.0 * ping,
                    given(l.idle_timeout)
                ),
            );
        }
    }
    let recording = raw.recording.and_then(|r| recording_config(p, r));
    let snapshot = raw
        .snapshot
        .and_then(|r| snapshot_config(p, r, recording.is_some()));
    ServerConfig {
        listen,
        read_token,
        admin_token,
        limits,
        shutdown_timeout: Duration::from_secs_f64(shutdown_timeout),
        recording,
        snapshot,
    }
}

/// `[server.snapshot]`: `None` unless `enabled = true` (then `path` is required, and so is an
/// enabled `[server.recording]`: a snapshot alone would silently lose the batches after it).
fn snapshot_config(
    p: &mut Problems,
    r: RawSnapshot,
    recording: bool,
) -> Option<crate::snapshot::SnapshotConfig> {
    let at = |k: &str| format!("server.snapshot.{k}");
    let interval = r
        .interval
        .map_or(10.0, |v| p.positive(&at("interval"), v, " s"));
    if r.enabled != Some(true) {
        return None;
    }
    if !recording {
        p.add(
            at("enabled"),
            "needs [server.recording] enabled: a restart restores the snapshot and then the batches recorded after it; without a recording those would be lost",
        );
    }
    let path = p.required(&at("path"), r.path, "the snapshot file")?;
    if path.trim().is_empty() {
        p.add(at("path"), "must not be blank");
    }
    Some(crate::snapshot::SnapshotConfig {
        path: path.into(),
        interval: Duration::from_secs_f64(interval),
    })
}

/// `[server.recording]`: `None` unless `enabled = true` (then `directory` is required).
fn recording_config(p: &mut Problems, r: RawRecording) -> Option<crate::record::RecordingConfig> {
    use crate::record::{RecordingConfig, SyncPolicy};
    let at = |k: &str| format!("server.recording.{k}");
    let rotate_bytes = r
        .rotate_bytes
        .map(|v| p.int(&at("rotate_bytes"), v, 4096, i64::MAX) as u64);
    let rotate_seconds = r
        .rotate_seconds
        .map(|v| p.positive(&at("rotate_seconds"), v, " s"));
    let interval = r
        .sync_interval_ms
        .map(|v| p.int(&at("sync_interval_ms"), v, 1, 3_600_000));
    let sync = match r.sync.as_deref() {
        None | Some("fsync") => SyncPolicy::Fsync,
        Some("none") => SyncPolicy::None,
        Some("flush") => SyncPolicy::Flush,
        Some("interval") => {
            let ms = interval.unwrap_or(1000) as u64;
            SyncPolicy::Interval(Duration::from_millis(ms))
        }
        Some(other) => {
            p.add(
                at("sync"),
                format!("must be \"none\", \"flush\", \"fsync\" or \"interval\", got {other:?}"),
            );
            SyncPolicy::Fsync
        }
    };
    if interval.is_some() && !matches!(sync, SyncPolicy::Interval(_)) {
        p.add(at("sync_interval_ms"), "only used with sync = \"interval\"");
    }
    if r.enabled != Some(true) {
        return None;
    }
    let directory = p.required(&at("directory"), r.directory, "where recording files go")?;
    if directory.trim().is_empty() {
        p.add(at("directory"), "must not be blank");
    }
    Some(RecordingConfig {
        directory: directory.into(),
        rotate_bytes,
        rotate_seconds,
        sync,
    })
}

/// A one-screen summary of a valid site, printed by `plotweave check`.
pub fn summary(site: &Site) -> String {
    use std::fmt::Write as _;
    let mut s = String::new();
    let _ = writeln!(s, "site {:?}: configuration is valid", site.name);
    let assoc = match site.tracker.association {
        AssociationMethod::Gnn => "gnn".to_string(),
        AssociationMethod::Jpda {
            max_exact_hypotheses,
            k_best,
        } => format!("jpda (exact up to {max_exact_hypotheses} hypotheses, else {k_best} best)"),
    };
    let _ = writeln!(
        s,
        "tracker: association {assoc}, gate probability {}, reorder window {} s",
        site.tracker.gate_probability, site.tracker.reorder_window
    );
    for (c, e) in site.sensors.iter().zip(&site.sensor_extra) {
        let kind = match c.kind {
            SensorKind::Cartesian { .. } => "cartesian",
            SensorKind::Polar { .. } => "polar",
        };
        let _ = writeln!(
            s,
            "sensor {:?}: {kind}, P_D {}, clutter {} per scan, birth {} per scan, token {}",
            c.id,
            c.detection_probability,
            c.clutter_rate,
            c.birth_rate,
            if e.token.is_some() {
                "set"
            } else {
                "none (open)"
            }
        );
    }
    let _ = writeln!(
        s,
        "server: listen {}, read token {}, admin token {}",
        site.server.listen,
        if site.server.read_token.is_some() {
            "set"
        } else {
            "none"
        },
        if site.server.admin_token.is_some() {
            "set"
        } else {
            "none"
        }
    );
    if let Some(r) = &site.server.recording {
        let _ = writeln!(
            s,
            "recording: into {}, sync {:?}, rotate at {} bytes / {} s",
            r.directory.display(),
            r.sync,
            r.rotate_bytes.map_or("no limit".into(), |b| b.to_string()),
            r.rotate_seconds
                .map_or("no limit".into(), |t| t.to_string())
        );
    }
    s
}

/// Deserialise one TOML section as `T`. On failure, the key path of the problem (`path`
/// extended by the path inside `value` where serde found it) and a message for the user.
pub(crate) fn deserialize_section<T: for<'de> Deserialize<'de>>(
    path: &str,
    value: toml::Value,
) -> Result<T, (String, String)> {
    serde_path_to_error::deserialize::<_, T>(value).map_err(|e| {
        let inner = e.path().to_string();
        let full = if inner == "." {
            path.to_string()
        } else {
            format!("{path}.{inner}")
        };
        (full, e.into_inner().to_string().trim().to_string())
    })
}

#[cfg(test)]
mod tests {
    use super::*;

    fn no_env(_: &str) -> Option<String> {
        None
    }

    fn problems(text: &str) -> Vec<String> {
        match parse(text, "t.toml", no_env) {
            Ok(_) => panic!("accepted:\n{text}"),
            Err(Error::Config { problems, .. }) => {
                problems.iter().map(ToString::to_string).collect()
            }
            Err(e) => panic!("unexpected error {e}"),
        }
    }

    const GOOD: &str = r#"
[site]
name = "Test Reach"

[[sensor]]
id = "reach-radar"
kind = "polar"
position = { x = 10.0, y = -5.0 }
noise = { range = 12.0, bearing_deg = 0.4 }
fov = { max_range = 4000.0 }
detection_probability = 0.9
clutter_rate = 15.0
birth_rate = 0.05

[[sensor]]
id = "reach-camera"
kind = "cartesian"
noise = { sigma = 2.5 }
fov = { x_min = -100.0, x_max = 100.0, y_min = 0.0, y_max = 300.0 }
detection_probability = 0.8
clutter_rate = 0.2
birth_rate = 0.02
token = "camera-token-0123456789"
"#;

    #[test]
    fn good_config_parses_with_defaults() {
        let site = parse(GOOD, "t.toml", no_env).unwrap();
        assert_eq!(site.name, "Test Reach");
        assert_eq!(site.sensors.len(), 2);
        assert_eq!(
            site.sensors[0].kind,
            SensorKind::Polar {
                x: 10.0,
                y: -5.0,
                sigma_range: 12.0,
                sigma_bearing_deg: 0.4,
                sigma_range_rate: None
            }
        );
        assert_eq!(
            site.sensors[0].fov,
            FieldOfView::Sector {
                min_range: 0.0,
                max_range: 4000.0,
                bearing_start_deg: 0.0,
                bearing_extent_deg: 360.0
            }
        );
        assert_eq!(site.tracker, TrackerConfig::default());
        assert_eq!(site.server.limits, Limits::default());
        assert_eq!(site.server.listen.to_string(), DEFAULT_LISTEN);
        assert!(site.sensor_extra[0].token.is_none());
        assert_eq!(
            site.sensor_extra[1].token,
            Some(Secret::new("camera-token-0123456789"))
        );
        assert_eq!(site.open_surfaces().len(), 2);
    }

    #[test]
    fn every_problem_is_reported_with_its_key_path() {
        let text = GOOD
            .replace("detection_probability = 0.8", "detection_probability = 1.3")
            .replace("clutter_rate = 15.0", "clutter_rate = -1.0\nbogus_key = 3")
            .replace("sigma = 2.5", "sigma = 0.0")
            + "\n[tracker]\nassociation = \"nearest\"\ngate_probability = 1.5\n[server]\nlisten = \"localhost\"\n[server.limits]\nqueue_depth = 0\n";
        let got = problems(&text);
        let expect = [
            // sensor[0] has an unknown key: serde reports it (with the key in the path) and
            // the rest of that sensor is not checked
            "sensor[0].bogus_key: unknown field `bogus_key`, expected one of `id`",
            "sensor[1].detection_probability: must be in (0, 1], got 1.3",
            "sensor[1].noise.sigma: must be finite and > 0 m, got 0",
            "tracker.association: must be \"gnn\" or \"jpda\", got \"nearest\"",
            "tracker.gate_probability: must be in (0, 1), got 1.5",
            "server.listen: must be HOST:PORT",
            "server.limits.queue_depth: must be an integer in [1, 1000000], got 0",
        ];
        for e in expect {
            assert!(
                got.iter().any(|g| g.starts_with(e)),
                "missing {e:?} in {got:#?}"
            );
        }
        assert_eq!(got.len(), expect.len(), "{got:#?}");
    }

    #[test]
    fn missing_and_misplaced_keys() {
        let text = r#"
[site]
name = "x"
[[sensor]]
id = "a b"
kind = "cartesian"
position = { x = 1.0, y = 2.0 }
noise = { range = 3.0 }
fov = { x_min = 5.0, x_max = 1.0, y_min = 0.0, y_max = 1.0, max_range = 3.0 }
[[sensor]]
id = "p"
kind = "sonar"
"#;
        let got = problems(text);
        for e in [
            "sensor[0].id: must be 1 to 64 characters",
            "sensor[0].detection_probability: required",
            "sensor[0].clutter_rate: required",
            "sensor[0].birth_rate: required",
            "sensor[0].position: not used by a cartesian sensor",
            "sensor[0].noise.range: polar noise key on a cartesian sensor",
            "sensor[0].noise.sigma: required",
            "sensor[0].fov.max_range: sector key on a cartesian sensor",
            "sensor[0].fov.x_max: must be greater than fov.x_min (5), got 1",
            "sensor[1].kind: must be \"cartesian\" or \"polar\", got \"sonar\"",
            "sensor[1].noise: required",
        ] {
            assert!(
                got.iter().any(|g| g.starts_with(e)),
                "missing {e:?} in {got:#?}"
            );
        }
    }

    #[test]
    fn unknown_sections_and_syntax_errors() {
        let got = problems("[sitee]\nname = \"x\"\n");
        assert!(got.iter().any(|g| g.starts_with("sitee: unknown key")));
        assert!(got.iter().any(|g| g.starts_with("site.name: required")));
        // Found by the site_config fuzz target: a quoted key is named quoted, never as "".
        let got = problems("\"\" = 1\n\"a.b\" = 2\n\"x\\ny\" = 3\n");
        for e in [
            r#""": unknown key"#,
            r#""a.b": unknown key"#,
            r#""x\ny": unknown key"#,
        ] {
            assert!(
                got.iter().any(|g| g.starts_with(e)),
                "missing {e:?} in {got:#?}"
            );
        }
        assert!(got.iter().any(|g| g.starts_with("sensor: at least one")));
        let got = problems("[site\nname = 1");
        assert_eq!(got.len(), 1);
        assert!(got[0].starts_with("(toml syntax): "), "{got:?}");
        let got = problems(&GOOD.replace("[site]", "[site]\nname2 = 3"));
        assert_eq!(
            got,
            ["site.name2: unknown field `name2`, expected `name` or `origin`"]
        );
    }

    #[test]
    fn keepalive_keys_are_validated_together() {
        let limits = |l: &str| format!("{GOOD}\n[server.limits]\n{l}\n");
        let site = parse(
            &limits("ping_interval = 0.2\nidle_timeout = 0.6"),
            "t",
            no_env,
        )
        .unwrap();
        assert_eq!(
            (
                site.server.limits.ping_interval,
                site.server.limits.idle_timeout
            ),
            (0.2, 0.6)
        );
        // Both off is fine; pings without a timeout too.
        assert!(parse(&limits("ping_interval = 0\nidle_timeout = 0"), "t", no_env).is_ok());
        assert!(parse(&limits("idle_timeout = 0"), "t", no_env).is_ok());
        for (l, expect) in [
            (
                "ping_interval = -1",
                "server.limits.ping_interval: must be in [0, 3600] s (0 turns it off), got -1",
            ),
            (
                "idle_timeout = inf",
                "server.limits.idle_timeout: must be in [0, 86400] s (0 turns it off), got inf",
            ),
            (
                "ping_interval = 0",
                "server.limits.idle_timeout: is 30 s (the default) but server.limits.ping_interval is 0: without pings a consumer that only listens says nothing and would be closed; set a ping_interval or idle_timeout = 0",
            ),
            (
                "ping_interval = 20",
                "server.limits.idle_timeout: must be at least twice server.limits.ping_interval (2 × 20 s = 40 s) so that a live peer's pong arrives in time, got 30 s (the default)",
            ),
            (
                "ping_interval = 1\nidle_timeout = 1.5",
                "server.limits.idle_timeout: must be at least twice server.limits.ping_interval (2 × 1 s = 2 s) so that a live peer's pong arrives in time, got 1.5 s",
            ),
        ] {
            let got = problems(&limits(l));
            assert_eq!(got, vec![expect.to_string()], "{l}");
        }
    }

    #[test]
    fn tokens_come_from_the_environment_and_must_be_distinct() {
        let env = |k: &str| match k {
            "PLOTWEAVE_TOKEN_REACH_RADAR" => Some("radar-token-0123456789".to_string()),
            "PLOTWEAVE_ADMIN_TOKEN" => Some("camera-token-0123456789".to_string()),
            "PLOTWEAVE_READ_TOKEN" => Some("short".to_string()),
            _ => None,
        };
        let got = match parse(GOOD, "t.toml", env) {
            Err(Error::Config { problems, .. }) => {
                problems.iter().map(ToString::to_string).collect::<Vec<_>>()
            }
            other => panic!("{other:?}"),
        };
        assert_eq!(
            got,
            vec![
                "server.read_token: token (from PLOTWEAVE_READ_TOKEN) must be at least 16 characters, got 5",
                "server.admin_token: must differ from sensor[1].token: a token names exactly one role",
            ]
        );
        let env = |k: &str| {
            (k == "PLOTWEAVE_TOKEN_REACH_RADAR").then(|| "radar-token-0123456789".to_string())
        };
        let site = parse(GOOD, "t.toml", env).unwrap();
        assert_eq!(
            site.sensor_extra[0].token,
            Some(Secret::new("radar-token-0123456789"))
        );
        assert_eq!(
            token_env_var("east-pier.radar"),
            "PLOTWEAVE_TOKEN_EAST_PIER_RADAR"
        );
        assert_eq!(
            format!("{:?}", site.sensor_extra[0].token),
            "Some(Secret(***))"
        );
    }

    #[test]
    fn management_and_association_options() {
        let text = GOOD.to_string()
            + "[tracker]\nassociation = \"gnn\"\nk_best = 5\n[tracker.management]\nmethod = \"m_of_n\"\nm = 4\nn = 3\nconfirm = 0.5\n";
        let got = problems(&text);
        assert!(
            got.iter()
                .any(|g| g == "tracker.k_best: only used with association = \"jpda\""),
            "{got:#?}"
        );
        assert!(
            got.iter()
                .any(|g| g == "tracker.management.m: must be <= n (3), got 4"),
            "{got:#?}"
        );
        assert!(
            got.iter()
                .any(|g| g == "tracker.management.confirm: not used with method = \"m_of_n\""),
            "{got:#?}"
        );
        let text = GOOD.to_string()
            + "[tracker]\nassociation = \"jpda\"\nk_best = 7\nmax_exact_hypotheses = 500\n[tracker.management]\nmethod = \"m_of_n\"\nm = 2\nn = 3\nmax_misses = 4\n";
        let site = parse(&text, "t", no_env).unwrap();
        assert_eq!(
            site.tracker.association,
            AssociationMethod::Jpda {
                max_exact_hypotheses: 500,
                k_best: 7
            }
        );
        assert_eq!(
            site.tracker.management,
            Management::MOfN {
                m: 2,
                n: 3,
                max_misses: 4
            }
        );
    }

    #[test]
    fn embedded_demo_site_is_valid() {
        let site = Site::demo(no_env).unwrap();
        assert_eq!(site.name, "Kestrel Bay");
        assert_eq!(site.sensors.len(), 2);
        assert!(site.sensor_extra.iter().all(|e| e.period.is_some()));
        assert!(summary(&site).contains("Kestrel Bay"));
    }
}
