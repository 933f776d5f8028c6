//! Property checks shared by the fuzz targets (`fuzz/fuzz_targets/`) and their regression test
//! (`service/tests/fuzz_regressions.rs`), so that a corpus file means the same thing under the
//! fuzzer and under `cargo test`. Not part of the service's API (hidden from the docs).
//!
//! Each check runs one real entry point on one input and then asserts properties of the answer
//! that do not come from the code under test: an accepted batch is compared with an independent
//! `serde_json::Value` reading of the same text and with the ranges the contract documents; a
//! valid site is checked against the documented ranges, against the core's own `validate`, and
//! by rendering it back to TOML and parsing that again (it must give the same site). A check
//! returns `Err(violation)` naming the broken property; the fuzz target panics with it, the
//! test lists it with the file name.

use filter_core::tracker::{
    AssociationMethod, FieldOfView, Management, Measurement, SensorKind, Tracker,
};

use crate::config::{self, MIN_TOKEN_LEN, Site};
use crate::error::{Code, Error, Rejection};
use crate::record::SyncPolicy;
use crate::wire::{self, DecodeLimits};

/// The site the ingest target decodes against: the end-to-end tests' invented "Gannet Sound"
/// (`tests/src/lib.rs`: polar `sound-radar`, cartesian `quay-camera`) plus a polar
/// `sound-doppler` configured with `noise.range_rate`, so that every detection shape of
/// [`wire::decode_batch`] is reachable. `max_detections` is small so the fuzzer can reach
/// `too_many_detections`.
pub const INGEST_SITE_TOML: &str = r#"
[site]
name = "Gannet Sound"

[[sensor]]
id = "sound-radar"
kind = "polar"
position = { x = 0.0, y = 0.0 }
noise = { range = 10.0, bearing_deg = 0.5 }
fov = { max_range = 5000.0 }
detection_probability = 0.9
clutter_rate = 2.0
birth_rate = 0.05

[[sensor]]
id = "quay-camera"
kind = "cartesian"
noise = { sigma = 2.0 }
fov = { x_min = -1000.0, x_max = 1000.0, y_min = 0.0, y_max = 2000.0 }
detection_probability = 0.9
clutter_rate = 0.1
birth_rate = 0.05

[[sensor]]
id = "sound-doppler"
kind = "polar"
position = { x = 250.0, y = -40.0 }
noise = { range = 15.0, bearing_deg = 0.8, range_rate = 0.3 }
fov = { max_range = 8000.0, bearing_start_deg = 270.0, bearing_extent_deg = 180.0 }
detection_probability = 0.8
clutter_rate = 4.0
birth_rate = 0.05

[server.limits]
max_detections = 8
"#;

/// The parsed [`INGEST_SITE_TOML`].
pub fn ingest_site() -> Result<Site, Error> {
    config::parse(INGEST_SITE_TOML, "fuzzing ingest site", |_| None)
}

/// The codes [`wire::decode_batch`] may answer with (its doc lists the rules).
pub const DECODE_CODES: [Code; 6] = [
    Code::MalformedJson,
    Code::Schema,
    Code::NonFinite,
    Code::OutOfRange,
    Code::UnknownSensor,
    Code::TooManyDetections,
];

/// What an ingest input did, when every property held.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum IngestOutcome {
    /// Decoded into a scan with this many detections.
    Accepted {
        /// Number of detections.
        detections: usize,
    },
    /// Refused with this code.
    Rejected(Code),
}

/// Decode `text` as the server does (`handle_batch` → [`wire::decode_batch`] with the site's
/// `max_detections`) and check the answer. An accepted batch must agree field by field with
/// a `serde_json::Value` reading of `text`, every number must be finite and in the documented
/// range (`time` ≥ 0 s, `range` ≥ 0 m, `bearing` in [0, 360) degrees), the detection shape
/// must fit the sensor's kind and the count must not exceed the limit. A refusal must carry one
/// of [`DECODE_CODES`], a non-empty message naming the batch (its seq and sensor when the
/// rejection carries them), and serialise to the contract's error reply. Decoding twice must
/// give the same answer.
pub fn check_ingest(text: &str, site: &Site) -> Result<IngestOutcome, String> {
    let limits = DecodeLimits {
        max_detections: site.server.limits.max_detections,
    };
    let first = wire::decode_batch(text, &site.sensors, limits);
    if wire::decode_batch(text, &site.sensors, limits) != first {
        return Err("decoding the same text twice gave different answers".into());
    }
    let value = serde_json::from_str::<serde_json::Value>(text).ok();
    match first {
        Ok(scan) => {
            let Some(value) = value else {
                return Err(format!(
                    "accepted a batch that serde_json::Value cannot parse: {scan:?}"
                ));
            };
            check_scan(&scan, &value, site, limits)?;
            Ok(IngestOutcome::Accepted {
                detections: scan.detections.len(),
            })
        }
        Err(r) => {
            check_rejection(&r, value.as_ref(), site)?;
            Ok(IngestOutcome::Rejected(r.code))
        }
    }
}

fn number(v: &serde_json::Value, key: &str) -> Option<f64> {
    v.get(key).and_then(serde_json::Value::as_f64)
}

/// `key` present with a non-null value.
fn present(v: &serde_json::Value, key: &str) -> bool {
    v.get(key).is_some_and(|x| !x.is_null())
}

fn same(a: f64, b: Option<f64>) -> bool {
    b.is_some_and(|b| a.to_bits() == b.to_bits() || a == b)
}

fn check_scan(
    scan: &filter_core::tracker::Scan,
    value: &serde_json::Value,
    site: &Site,
    limits: DecodeLimits,
) -> Result<(), String> {
    let Some(sensor) = site.sensors.get(scan.sensor) else {
        return Err(format!("scan.sensor {} is not a sensor index", scan.sensor));
    };
    if value.get("sensor").and_then(serde_json::Value::as_str) != Some(sensor.id.as_str()) {
        return Err(format!(
            "scan is for {:?} but the text names {:?}",
            sensor.id,
            value.get("sensor")
        ));
    }
    if value.get("seq").and_then(serde_json::Value::as_u64) != Some(scan.tag) {
        return Err(format!(
            "scan tag {} differs from the text's seq {:?}",
            scan.tag,
            value.get("seq")
        ));
    }
    if !(scan.time.is_finite() && scan.time >= 0.0 && same(scan.time, number(value, "time"))) {
        return Err(format!(
            "scan time {} is not finite >= 0 or differs from the text's {:?}",
            scan.time,
            value.get("time")
        ));
    }
    let Some(dets) = value
        .get("detections")
        .and_then(serde_json::Value::as_array)
    else {
        return Err("accepted a batch whose detections is not an array".into());
    };
    if dets.len() != scan.detections.len() || dets.len() > limits.max_detections {
        return Err(format!(
            "{} detections in the text, {} in the scan, limit {}",
            dets.len(),
            scan.detections.len(),
            limits.max_detections
        ));
    }
    for (i, (d, m)) in dets.iter().zip(&scan.detections).enumerate() {
        let bad = |what: &str| Err(format!("detections[{i}]: {what}: {m:?} from {d}"));
        if present(d, "snr_db") && !number(d, "snr_db").is_some_and(f64::is_finite) {
            return bad("accepted a non-finite or non-numeric snr_db");
        }
        match (sensor.kind, m) {
            (SensorKind::Cartesian { .. }, Measurement::Cartesian { x, y }) => {
                if !(x.is_finite() && y.is_finite()) {
                    return bad("non-finite position");
                }
                if !same(*x, number(d, "x")) || !same(*y, number(d, "y")) {
                    return bad("position differs from the text");
                }
                if ["range", "bearing", "range_rate"]
                    .iter()
                    .any(|k| present(d, k))
                {
                    return bad("polar field accepted on a cartesian sensor");
                }
            }
            (
                SensorKind::Polar {
                    sigma_range_rate, ..
                },
                Measurement::Polar {
                    range,
                    bearing_deg,
                    range_rate,
                },
            ) => {
                if !(range.is_finite() && *range >= 0.0) {
                    return bad("range not finite >= 0 m");
                }
                if !(bearing_deg.is_finite() && (0.0..360.0).contains(bearing_deg)) {
                    return bad("bearing not in [0, 360) degrees");
                }
                if !same(*range, number(d, "range")) || !same(*bearing_deg, number(d, "bearing")) {
                    return bad("range or bearing differs from the text");
                }
                match range_rate {
                    Some(r) if !(r.is_finite() && same(*r, number(d, "range_rate"))) => {
                        return bad("range_rate not finite or differs from the text");
                    }
                    None if sigma_range_rate.is_some() || present(d, "range_rate") => {
                        return bad("range_rate missing or dropped");
                    }
                    _ => {}
                }
                if present(d, "x") || present(d, "y") {
                    return bad("x/y accepted on a polar sensor");
                }
            }
            _ => return bad("detection shape does not fit the sensor's kind"),
        }
    }
    Ok(())
}

fn check_rejection(
    r: &Rejection,
    value: Option<&serde_json::Value>,
    site: &Site,
) -> Result<(), String> {
    let bad = |what: &str| Err(format!("{what}: {r:?}"));
    if !DECODE_CODES.contains(&r.code) {
        return bad("code is not one decode_batch documents");
    }
    if r.message.trim().is_empty() || !r.message.starts_with("batch ") {
        return bad("message is empty or does not name the batch");
    }
    if let Some(seq) = r.seq
        && !r.message.starts_with(&format!("batch seq {seq}"))
    {
        return bad("message does not name the batch's seq");
    }
    if let Some(i) = r.sensor {
        let Some(s) = site.sensors.get(i) else {
            return bad("sensor index out of range");
        };
        if !r.message.contains(&format!("from {:?}", s.id)) {
            return bad("message does not name the sensor it is attributed to");
        }
    }
    match value {
        // Only text that is not JSON at all may be malformed_json; the typed decoder may stop
        // at a schema error or an overflowing number before it reaches a syntax error.
        None if !matches!(r.code, Code::MalformedJson | Code::Schema | Code::NonFinite) => {
            return bad("text is not JSON but the code is not malformed_json/schema/non_finite");
        }
        Some(_) if r.code == Code::MalformedJson => {
            return bad("text is valid JSON but the code is malformed_json");
        }
        Some(v) => {
            if let (Some(seq), Some(text_seq)) =
                (r.seq, v.get("seq").and_then(serde_json::Value::as_u64))
                && seq != text_seq
            {
                return bad("seq differs from the text's seq");
            }
        }
        None => {}
    }
    let reply: serde_json::Value = match serde_json::from_str(&r.to_json()) {
        Ok(v) => v,
        Err(e) => return bad(&format!("error reply is not JSON ({e})")),
    };
    let e = &reply["error"];
    if e["code"] != r.code.as_str()
        || e["message"] != r.message.as_str()
        || e["seq"].as_u64() != r.seq
    {
        return bad("error reply does not carry the rejection's code, message and seq");
    }
    Ok(())
}

/// What a site configuration input did, when every property held.
#[derive(Debug, Clone, PartialEq, Eq)]
pub enum ConfigOutcome {
    /// A valid site with this many sensors.
    Valid {
        /// Number of sensors.
        sensors: usize,
    },
    /// Refused with this many problems.
    Problems(usize),
}

/// The top-level keys of a site file.
const TOP_LEVEL: [&str; 4] = ["site", "tracker", "sensor", "server"];

/// The source name the config check passes to [`config::parse`].
const SOURCE: &str = "fuzz.toml";

/// Parse `text` as `plotweave check --config` does ([`config::parse`], no environment) and
/// check the answer. A valid site must be in every documented range, pass the core's own
/// `validate` and `Tracker::new`, have its summary name every sensor, and re-validate: rendered
/// back to TOML ([`render_site`]) and parsed again it gives the same site. A refusal must be
/// [`Error::Config`] with a non-empty list of problems, each with a non-empty message and a
/// printable key path that starts with a top-level key of the document or of the site format
/// (or is `(toml syntax)` when the text is not TOML). Parsing twice must give the same answer.
pub fn check_site_config(text: &str) -> Result<ConfigOutcome, String> {
    let first = config::parse(text, SOURCE, |_| None);
    let again = config::parse(text, SOURCE, |_| None);
    match (first, again) {
        (Ok(site), Ok(again)) => {
            if site != again {
                return Err("parsing the same text twice gave different sites".into());
            }
            check_site(&site)?;
            let rendered = render_site(&site)?;
            match config::parse(&rendered, "rendered site", |_| None) {
                Ok(back) if back == site => {}
                Ok(back) => {
                    return Err(format!(
                        "the rendered site parses to a different site:\n{rendered}\n{site:?}\n{back:?}"
                    ));
                }
                Err(e) => {
                    return Err(format!(
                        "the rendered site does not re-validate:\n{rendered}\n{e}"
                    ));
                }
            }
            Ok(ConfigOutcome::Valid {
                sensors: site.sensors.len(),
            })
        }
        (Err(e), Err(again)) => {
            let n = check_problems(text, &e)?;
            if e.to_string() != again.to_string() {
                return Err("parsing the same text twice gave different problems".into());
            }
            Ok(ConfigOutcome::Problems(n))
        }
        _ => Err("parsing the same text twice gave a site once and problems once".into()),
    }
}

fn check_problems(text: &str, e: &Error) -> Result<usize, String> {
    let Error::Config {
        source_name,
        problems,
    } = e
    else {
        return Err(format!("parse failed with a non-config error: {e}"));
    };
    if source_name != SOURCE || !e.to_string().starts_with(&format!("{SOURCE}: ")) {
        return Err(format!("the error does not name its source: {e}"));
    }
    if problems.is_empty() {
        return Err("parse failed with an empty list of problems".into());
    }
    let keys: Option<Vec<String>> = text
        .parse::<toml::Table>()
        .ok()
        .map(|t| t.keys().cloned().collect());
    let starts_with_key = |path: &str, key: &str| {
        path.strip_prefix(key)
            .is_some_and(|rest| rest.is_empty() || rest.starts_with('.') || rest.starts_with('['))
    };
    for p in problems {
        let bad = |what: &str| Err(format!("{what}: {p:?}"));
        if p.message.trim().is_empty() {
            return bad("problem with an empty message");
        }
        if p.path.trim().is_empty() || p.path.chars().any(char::is_control) {
            return bad("problem whose key path is empty or not printable");
        }
        // A required key that is missing is named by where it belongs, under a known table.
        let names_key = match &keys {
            None => p.path == "(toml syntax)",
            Some(keys) => {
                TOP_LEVEL.iter().any(|k| starts_with_key(&p.path, k))
                    || keys.iter().any(|k| {
                        starts_with_key(&p.path, k) || starts_with_key(&p.path, &format!("{k:?}"))
                    })
            }
        };
        if !names_key {
            return bad("problem whose key path names no top-level key of the document");
        }
    }
    Ok(problems.len())
}

/// Check a valid site against the ranges `docs/configuration.md` documents, independently of
/// the validator, and against the core's own checks.
fn check_site(site: &Site) -> Result<(), String> {
    let bad = |what: String| Err(format!("valid site breaks a documented rule: {what}"));
    if site.name.trim().is_empty() {
        return bad("blank site.name".into());
    }
    if let Some((lat, lon)) = site.origin
        && !((-90.0..=90.0).contains(&lat) && (-180.0..=180.0).contains(&lon))
    {
        return bad(format!("origin ({lat}, {lon})"));
    }
    if site.sensors.is_empty() || site.sensors.len() != site.sensor_extra.len() {
        return bad("no sensors, or sensor_extra not parallel to sensors".into());
    }
    if let Err(e) = site.tracker.validate() {
        return bad(format!("tracker: {e}"));
    }
    let mut tokens: Vec<&[u8]> = Vec::new();
    for (i, (s, x)) in site.sensors.iter().zip(&site.sensor_extra).enumerate() {
        let id_ok = !s.id.is_empty()
            && s.id.len() <= 64
            && s.id
                .chars()
                .all(|c| c.is_ascii_alphanumeric() || matches!(c, '-' | '_' | '.'));
        if !id_ok || site.sensors[..i].iter().any(|o| o.id == s.id) {
            return bad(format!("sensor[{i}].id {:?} invalid or repeated", s.id));
        }
        if let Err(e) = s.validate() {
            return bad(format!("sensor[{i}]: {e}"));
        }
        if x.period.is_some_and(|p| !(p.is_finite() && p > 0.0)) {
            return bad(format!("sensor[{i}].period {:?}", x.period));
        }
        tokens.extend(x.token.as_ref().map(config::Secret::expose));
    }
    tokens.extend(site.server.read_token.as_ref().map(config::Secret::expose));
    tokens.extend(site.server.admin_token.as_ref().map(config::Secret::expose));
    for (i, t) in tokens.iter().enumerate() {
        let text = String::from_utf8_lossy(t);
        if t.len() < MIN_TOKEN_LEN
            || text.chars().any(|c| c.is_whitespace() || c.is_control())
            || tokens[..i].contains(t)
        {
            return bad(format!(
                "token {i} is short, has whitespace, or is repeated"
            ));
        }
    }
    let l = &site.server.limits;
    let in_range = |v: usize, lo: usize, hi: usize| (lo..=hi).contains(&v);
    if !(in_range(l.max_message_bytes, 256, 1 << 30)
        && in_range(l.max_detections, 1, 10_000_000)
        && in_range(l.max_connections, 1, 1_000_000)
        && in_range(l.queue_depth, 1, 1_000_000)
        && in_range(l.frame_buffer, 1, 1_000_000)
        && l.max_batches_per_second.is_finite()
        && l.max_batches_per_second > 0.0
        && l.max_time_ahead.is_finite()
        && l.max_time_ahead >= 0.0
        && (0.0..=3600.0).contains(&l.ping_interval)
        && (0.0..=86_400.0).contains(&l.idle_timeout)
        && (l.idle_timeout == 0.0
            || l.ping_interval > 0.0 && l.idle_timeout >= 2.0 * l.ping_interval))
    {
        return bad(format!("server.limits {l:?}"));
    }
    let timeout = site.server.shutdown_timeout.as_secs_f64();
    if !(timeout > 0.0 && timeout <= 3600.0) {
        return bad(format!("server.shutdown_timeout {timeout}"));
    }
    if let Err(e) = Tracker::new(site.tracker.clone(), site.sensors.clone()) {
        return bad(format!("Tracker::new refuses it: {e}"));
    }
    let summary = config::summary(site);
    if !summary.contains("configuration is valid")
        || site
            .sensors
            .iter()
            .any(|s| !summary.contains(&format!("sensor {:?}", s.id)))
    {
        return bad(format!("summary does not name every sensor:\n{summary}"));
    }
    Ok(())
}

/// Write a valid site back as site TOML (every key explicit), for the round-trip check.
///
/// A key added to the site file must be added here too; the round trip (and so the regression
/// test `service/tests/fuzz_regressions.rs`) fails until it is.
pub fn render_site(site: &Site) -> Result<String, String> {
    use toml::{Table, Value};
    fn int(v: usize) -> Result<Value, String> {
        i64::try_from(v)
            .map(Value::Integer)
            .map_err(|_| format!("{v} does not fit a TOML integer"))
    }
    fn table<const N: usize>(entries: [(&str, Value); N]) -> Value {
        Value::Table(
            entries
                .into_iter()
                .map(|(k, v)| (k.to_string(), v))
                .collect(),
        )
    }
    let secret = |s: &config::Secret| -> Result<Value, String> {
        String::from_utf8(s.expose().to_vec())
            .map(Value::String)
            .map_err(|_| "token is not UTF-8".to_string())
    };
    let f = Value::Float;
    let mut doc = Table::new();

    let mut s = Table::new();
    s.insert("name".into(), Value::String(site.name.clone()));
    if let Some((lat, lon)) = site.origin {
        s.insert("origin".into(), table([("lat", f(lat)), ("lon", f(lon))]));
    }
    doc.insert("site".into(), Value::Table(s));

    let c = &site.tracker;
    let mut t = Table::new();
    match c.association {
        AssociationMethod::Gnn => {
            t.insert("association".into(), Value::String("gnn".into()));
        }
        AssociationMethod::Jpda {
            max_exact_hypotheses,
            k_best,
        } => {
            t.insert("association".into(), Value::String("jpda".into()));
            t.insert("max_exact_hypotheses".into(), int(max_exact_hypotheses)?);
            t.insert("k_best".into(), int(k_best)?);
        }
    }
    for (k, v) in [
        ("gate_probability", c.gate_probability),
        ("process_noise", c.process_noise),
        ("reorder_window", c.reorder_window),
        ("max_position_std", c.max_position_std),
        ("initial_velocity_std", c.initial_velocity_std),
        ("survival_probability", c.survival_probability),
    ] {
        t.insert(k.into(), f(v));
    }
    t.insert("health_window".into(), int(c.health_window)?);
    let management = match c.management {
        Management::Existence { confirm, delete } => table([
            ("method", Value::String("existence".into())),
            ("confirm", f(confirm)),
            ("delete", f(delete)),
        ]),
        Management::MOfN { m, n, max_misses } => table([
            ("method", Value::String("m_of_n".into())),
            ("m", Value::Integer(m.into())),
            ("n", Value::Integer(n.into())),
            ("max_misses", Value::Integer(max_misses.into())),
        ]),
    };
    t.insert("management".into(), management);
    doc.insert("tracker".into(), Value::Table(t));

    let mut sensors = Vec::new();
    for (c, x) in site.sensors.iter().zip(&site.sensor_extra) {
        let mut s = Table::new();
        s.insert("id".into(), Value::String(c.id.clone()));
        match c.kind {
            SensorKind::Cartesian { sigma } => {
                s.insert("kind".into(), Value::String("cartesian".into()));
                s.insert("noise".into(), table([("sigma", f(sigma))]));
            }
            SensorKind::Polar {
                x,
                y,
                sigma_range,
                sigma_bearing_deg,
                sigma_range_rate,
            } => {
                s.insert("kind".into(), Value::String("polar".into()));
                s.insert("position".into(), table([("x", f(x)), ("y", f(y))]));
                let mut noise = Table::new();
                noise.insert("range".into(), f(sigma_range));
                noise.insert("bearing_deg".into(), f(sigma_bearing_deg));
                if let Some(r) = sigma_range_rate {
                    noise.insert("range_rate".into(), f(r));
                }
                s.insert("noise".into(), Value::Table(noise));
            }
        }
        let fov = match c.fov {
            FieldOfView::Rect {
                x_min,
                x_max,
                y_min,
                y_max,
            } => table([
                ("x_min", f(x_min)),
                ("x_max", f(x_max)),
                ("y_min", f(y_min)),
                ("y_max", f(y_max)),
            ]),
            FieldOfView::Sector {
                min_range,
                max_range,
                bearing_start_deg,
                bearing_extent_deg,
            } => table([
                ("min_range", f(min_range)),
                ("max_range", f(max_range)),
                ("bearing_start_deg", f(bearing_start_deg)),
                ("bearing_extent_deg", f(bearing_extent_deg)),
            ]),
        };
        s.insert("fov".into(), fov);
        s.insert("detection_probability".into(), f(c.detection_probability));
        s.insert("clutter_rate".into(), f(c.clutter_rate));
        s.insert("birth_rate".into(), f(c.birth_rate));
        if let Some(p) = x.period {
            s.insert("period".into(), f(p));
        }
        if let Some(tok) = &x.token {
            s.insert("token".into(), secret(tok)?);
        }
        sensors.push(Value::Table(s));
    }
    doc.insert("sensor".into(), Value::Array(sensors));

    let sv = &site.server;
    let mut s = Table::new();
    s.insert("listen".into(), Value::String(sv.listen.to_string()));
    if let Some(tok) = &sv.read_token {
        s.insert("read_token".into(), secret(tok)?);
    }
    if let Some(tok) = &sv.admin_token {
        s.insert("admin_token".into(), secret(tok)?);
    }
    s.insert(
        "shutdown_timeout".into(),
        f(sv.shutdown_timeout.as_secs_f64()),
    );
    let l = &sv.limits;
    s.insert(
        "limits".into(),
        table([
            ("max_message_bytes", int(l.max_message_bytes)?),
            ("max_detections", int(l.max_detections)?),
            ("max_batches_per_second", f(l.max_batches_per_second)),
            ("max_connections", int(l.max_connections)?),
            ("queue_depth", int(l.queue_depth)?),
            ("frame_buffer", int(l.frame_buffer)?),
            ("max_time_ahead", f(l.max_time_ahead)),
            ("ping_interval", f(l.ping_interval)),
            ("idle_timeout", f(l.idle_timeout)),
        ]),
    );
    if let Some(r) = &sv.recording {
        let mut rec = Table::new();
        rec.insert("enabled".into(), Value::Boolean(true));
        let dir = r
            .directory
            .to_str()
            .ok_or("recording directory is not UTF-8")?;
        rec.insert("directory".into(), Value::String(dir.into()));
        if let Some(b) = r.rotate_bytes {
            let b = i64::try_from(b).map_err(|_| format!("rotate_bytes {b} too large"))?;
            rec.insert("rotate_bytes".into(), Value::Integer(b));
        }
        if let Some(t) = r.rotate_seconds {
            rec.insert("rotate_seconds".into(), f(t));
        }
        let sync = match r.sync {
            SyncPolicy::None => "none",
            SyncPolicy::Flush => "flush",
            SyncPolicy::Fsync => "fsync",
            SyncPolicy::Interval(d) => {
                let ms = i64::try_from(d.as_millis())
                    .map_err(|_| "sync interval too large".to_string())?;
                rec.insert("sync_interval_ms".into(), Value::Integer(ms));
                "interval"
            }
        };
        rec.insert("sync".into(), Value::String(sync.into()));
        s.insert("recording".into(), Value::Table(rec));
    }
    doc.insert("server".into(), Value::Table(s));
    toml::to_string(&doc).map_err(|e| format!("cannot render the site as TOML: {e}"))
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn ingest_site_has_every_detection_shape() {
        let site = ingest_site().unwrap();
        let shapes: Vec<_> = site
            .sensors
            .iter()
            .map(|s| match s.kind {
                SensorKind::Cartesian { .. } => "cartesian",
                SensorKind::Polar {
                    sigma_range_rate: None,
                    ..
                } => "polar",
                SensorKind::Polar { .. } => "polar with range rate",
            })
            .collect();
        assert_eq!(shapes, ["polar", "cartesian", "polar with range rate"]);
    }

    #[test]
    fn demo_site_round_trips_through_render_site() {
        assert_eq!(
            check_site_config(config::DEMO_SITE_TOML),
            Ok(ConfigOutcome::Valid { sensors: 2 })
        );
    }

    #[test]
    fn render_site_writes_what_the_site_holds() {
        // The round trip can fail: a changed value renders differently.
        let site = config::Site::demo(|_| None).unwrap();
        let mut other = site.clone();
        other.sensors[0].clutter_rate += 1.0;
        assert_ne!(render_site(&site), render_site(&other));
        assert_eq!(
            check_site_config("[site]\nname = \"x\"\n"),
            Ok(ConfigOutcome::Problems(1))
        );
    }
}
