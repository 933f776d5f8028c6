//! The wire contract (version 1) at the service's edge: serde types of the detection batch and
//! the track frame, the hand-written conversion of a batch into a core
//! [`Scan`](filter_core::tracker::Scan), and the fast frame serialiser.
//!
//! **The core derives no serde.** A batch is decoded into [`BatchWire`] (serde, with the JSON
//! path of any type error), then checked rule by rule and converted by hand; every refusal is a
//! [`Rejection`] whose message names the batch, the field (`detections[3].bearing`) and the rule.
//!
//! Frames are the throughput bottleneck (one per batch, to every subscriber), so they are written
//! by [`write_frame`] straight into a reused `String` with `ryu` (shortest round-trip floats) and
//! `itoa`. [`FrameWire`] is the same frame as serde types; a unit test checks that both produce
//! identical bytes, so serde_json is the reference for the hand-written writer.
//!
//! Extra frame fields (beyond the contract's required ones), per track: `last_update` (s since
//! the epoch, time of the last detection used), `existence` (probability), `sensors` (ids of the
//! sensors that contributed, in site order) and `cov`, the 4×4 state covariance of
//! `[x, y, vx, vy]` as its 10 upper-triangle entries in row-major order:
//! `[Pxx, Pxy, Pxvx, Pxvy, Pyy, Pyvx, Pyvy, Pvxvx, Pvxvy, Pvyvy]` (m², m²/s, m²/s²).

use filter_core::tracker::{Measurement, Picture, Scan, SensorConfig, SensorKind, TrackStatus};
use serde::{Deserialize, Serialize};

use crate::error::{Code, Rejection};

/// One detection batch as it arrives (one scan or dwell of one sensor).
///
/// Unknown fields are ignored, so senders may add optional fields (the contract allows
/// extension); the known ones are checked by [`decode_batch`].
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct BatchWire {
    /// Id of a configured sensor.
    pub sensor: String,
    /// Per-sensor sequence number, increasing by one per batch.
    pub seq: u64,
    /// Time of validity of the scan, s since the UNIX epoch.
    pub time: f64,
    /// The scan's detections (may be empty).
    pub detections: Vec<DetectionWire>,
}

/// One detection: `x`/`y` for a cartesian sensor, `range`/`bearing` (and optional
/// `range_rate`) for a polar one; `snr_db` optional for both.
#[derive(Debug, Clone, Default, PartialEq, Serialize, Deserialize)]
pub struct DetectionWire {
    /// East, m, site frame (cartesian sensors).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub x: Option<f64>,
    /// North, m, site frame (cartesian sensors).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub y: Option<f64>,
    /// Range from the sensor, m (polar sensors).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub range: Option<f64>,
    /// Bearing from the sensor, degrees clockwise from north, in [0, 360) (polar sensors).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub bearing: Option<f64>,
    /// Range rate, m/s, positive when opening (polar sensors, optional).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub range_rate: Option<f64>,
    /// Signal-to-noise ratio, dB (optional; checked for finiteness, not used by the tracker).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub snr_db: Option<f64>,
}

/// Limits applied while decoding a batch.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct DecodeLimits {
    /// Most detections one batch may carry (`server.limits.max_detections`).
    pub max_detections: usize,
}

/// Where a batch came from, for messages: `batch seq 4711 from "east-pier-radar"`.
fn batch_name(seq: Option<u64>, sensor: Option<&str>) -> String {
    match (seq, sensor) {
        (Some(s), Some(id)) => format!("batch seq {s} from {id:?}"),
        (Some(s), None) => format!("batch seq {s}"),
        (None, Some(id)) => format!("batch (seq unknown) from {id:?}"),
        (None, None) => "batch (seq unknown)".to_string(),
    }
}

/// Best effort on an error path: read `seq` and `sensor` from a message that failed to decode.
fn peek_identity(text: &str) -> (Option<u64>, Option<String>) {
    match serde_json::from_str::<serde_json::Value>(text) {
        Ok(v) => (
            v.get("seq").and_then(serde_json::Value::as_u64),
            v.get("sensor")
                .and_then(serde_json::Value::as_str)
                .map(str::to_owned),
        ),
        Err(_) => (None, None),
    }
}

/// Decode one batch (a WebSocket text message or a recording line) and convert it into a
/// [`Scan`] for the sensor it names (`scan.tag` is the batch's `seq`).
///
/// Rules, each with its [`Code`]: valid JSON (`malformed_json`); the fields `sensor` (string),
/// `seq` (unsigned integer), `time` (number), `detections` (array) present with those types
/// (`schema`); every number finite, in extension fields too (`non_finite`); `sensor` configured (`unknown_sensor`);
/// `time` ≥ 0 (`out_of_range`); at most `limits.max_detections` detections
/// (`too_many_detections`); a cartesian sensor's detections carry `x` and `y` and no polar
/// fields, a polar sensor's carry `range` and `bearing` and no `x`/`y` (`schema`);
/// `range` ≥ 0 m and `bearing` in [0, 360) degrees (`out_of_range`); `range_rate` present on
/// every detection of a sensor configured with `noise.range_rate` (`schema`).
pub fn decode_batch(
    text: &str,
    sensors: &[SensorConfig],
    limits: DecodeLimits,
) -> Result<Scan, Rejection> {
    let mut de = serde_json::Deserializer::from_str(text);
    // The plain typed reading first; only a message it refuses is read again with path
    // tracking, which gives the same error with the path of the field for the message (always
    // tracking paths made decoding nearly twice as slow: `cargo bench -p plotweave --bench
    // decode`).
    let batch: BatchWire = match BatchWire::deserialize(&mut de) {
        Ok(b) => b,
        Err(_) => {
            de = serde_json::Deserializer::from_str(text);
            match serde_path_to_error::deserialize(&mut de) {
                Ok(b) => b,
                Err(e) => {
                    return Err(serde_rejection(
                        text,
                        &e.path().to_string(),
                        e.inner(),
                        sensors,
                    ));
                }
            }
        }
    };
    if let Err(e) = de.end() {
        let r = Rejection::new(
            Code::MalformedJson,
            Some(batch.seq),
            format!(
                "{}: not valid JSON: {e}",
                batch_name(Some(batch.seq), Some(&batch.sensor))
            ),
        );
        return Err(match sensors.iter().position(|s| s.id == batch.sensor) {
            Some(i) => r.for_sensor(i),
            None => r,
        });
    }
    if needs_full_reading(text) {
        check_all_numbers_finite(text, &batch, sensors)?;
    }
    convert_batch(batch, sensors, limits)
}

/// Whether the second pass of [`check_all_numbers_finite`] is needed: whether `text` can hold
/// something the typed decoder skips unchecked in an extension field, i.e. a number that
/// overflows `f64` (|x| ≥ 1.8 × 10³⁰⁸: it needs an exponent, which in JSON always follows a
/// digit, as in `1e999`, or at least 309 integer digits), or a string the full reading refuses
/// (an escape, such as a lone surrogate `\ud800`, or a raw control character). A batch with
/// none of these (the usual one: no exponents, no escapes) skips the pass; a false alarm (e.g.
/// `"2e5"` inside a string) only costs it.
fn needs_full_reading(text: &str) -> bool {
    let mut run = 0usize;
    let mut prev_digit = false;
    for &b in text.as_bytes() {
        if b.is_ascii_digit() {
            run += 1;
            if run >= 309 {
                return true;
            }
            prev_digit = true;
        } else {
            if (prev_digit && (b == b'e' || b == b'E'))
                || b == b'\\'
                || (b < 0x20 && !matches!(b, b'\t' | b'\n' | b'\r'))
            {
                return true;
            }
            run = 0;
            prev_digit = false;
        }
    }
    false
}

/// Every number of a batch must be finite, extension fields included; serde skips unknown
/// fields without reading their numbers, so a `1e999` there would otherwise be accepted (and
/// recorded as a line that `serde_json::Value` readers such as `plotweave replay` refuse).
/// One more allocation-free pass over the text reads every number (and string), when
/// [`needs_full_reading`] says the text may need it; the path of an offending
/// one is only looked for when there is one.
fn check_all_numbers_finite(
    text: &str,
    batch: &BatchWire,
    sensors: &[SensorConfig],
) -> Result<(), Rejection> {
    if AnyValue::deserialize(&mut serde_json::Deserializer::from_str(text)).is_ok() {
        return Ok(());
    }
    let mut de = serde_json::Deserializer::from_str(text);
    let Err(e) = serde_path_to_error::deserialize::<_, AnyValue>(&mut de) else {
        return Ok(());
    };
    let seq = Some(batch.seq);
    let name = batch_name(seq, Some(&batch.sensor));
    let r = classify_serde(seq, &name, &e.path().to_string(), e.inner());
    Err(match sensors.iter().position(|s| s.id == batch.sensor) {
        Some(i) => r.for_sensor(i),
        None => r,
    })
}

/// Any JSON value, read in full (numbers parsed, so an overflowing one is an error) and
/// discarded.
struct AnyValue;

impl<'de> Deserialize<'de> for AnyValue {
    fn deserialize<D: serde::Deserializer<'de>>(d: D) -> Result<Self, D::Error> {
        d.deserialize_any(AnyValue)
    }
}

impl<'de> serde::de::Visitor<'de> for AnyValue {
    type Value = AnyValue;

    fn expecting(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.write_str("any JSON value")
    }
    fn visit_bool<E>(self, _: bool) -> Result<Self, E> {
        Ok(self)
    }
    fn visit_i64<E>(self, _: i64) -> Result<Self, E> {
        Ok(self)
    }
    fn visit_u64<E>(self, _: u64) -> Result<Self, E> {
        Ok(self)
    }
    fn visit_f64<E: serde::de::Error>(self, v: f64) -> Result<Self, E> {
        if v.is_finite() {
            Ok(self)
        } else {
            Err(E::custom(format!("number out of range: {v}")))
        }
    }
    fn visit_str<E>(self, _: &str) -> Result<Self, E> {
        Ok(self)
    }
    fn visit_unit<E>(self) -> Result<Self, E> {
        Ok(self)
    }
    fn visit_seq<A: serde::de::SeqAccess<'de>>(self, mut a: A) -> Result<Self, A::Error> {
        while a.next_element::<AnyValue>()?.is_some() {}
        Ok(self)
    }
    fn visit_map<A: serde::de::MapAccess<'de>>(self, mut a: A) -> Result<Self, A::Error> {
        while a.next_entry::<serde::de::IgnoredAny, AnyValue>()?.is_some() {}
        Ok(self)
    }
}

fn serde_rejection(
    text: &str,
    path: &str,
    inner: &serde_json::Error,
    sensors: &[SensorConfig],
) -> Rejection {
    let (seq, sensor) = peek_identity(text);
    let name = batch_name(seq, sensor.as_deref());
    let r = classify_serde(seq, &name, path, inner);
    match sensor.and_then(|id| sensors.iter().position(|s| s.id == id)) {
        Some(i) => r.for_sensor(i),
        None => r,
    }
}

fn classify_serde(
    seq: Option<u64>,
    name: &str,
    path: &str,
    inner: &serde_json::Error,
) -> Rejection {
    let at = if path == "." {
        String::new()
    } else {
        format!("{path}: ")
    };
    let detail = inner.to_string();
    if detail.starts_with("number out of range") {
        return Rejection::new(
            Code::NonFinite,
            seq,
            format!("{name}: {at}every number must be finite ({detail})"),
        );
    }
    match inner.classify() {
        serde_json::error::Category::Data => {
            Rejection::new(Code::Schema, seq, format!("{name}: {at}{detail}"))
        }
        _ => Rejection::new(
            Code::MalformedJson,
            seq,
            format!("{name}: not valid JSON: {detail}"),
        ),
    }
}

/// Check a decoded [`BatchWire`] and convert it into a [`Scan`] (see [`decode_batch`]).
pub fn convert_batch(
    batch: BatchWire,
    sensors: &[SensorConfig],
    limits: DecodeLimits,
) -> Result<Scan, Rejection> {
    let seq = Some(batch.seq);
    let Some(index) = sensors.iter().position(|s| s.id == batch.sensor) else {
        let known: Vec<&str> = sensors.iter().map(|s| s.id.as_str()).collect();
        return Err(Rejection::new(
            Code::UnknownSensor,
            seq,
            format!(
                "{}: sensor: {:?} is not configured on this site (configured: {})",
                batch_name(seq, None),
                batch.sensor,
                known.join(", ")
            ),
        ));
    };
    let name = batch_name(seq, Some(&batch.sensor));
    let reject = |code: Code, msg: String| {
        Rejection::new(code, seq, format!("{name}: {msg}")).for_sensor(index)
    };
    if !batch.time.is_finite() {
        return Err(reject(
            Code::NonFinite,
            format!("time: must be finite, got {}", batch.time),
        ));
    }
    if batch.time < 0.0 {
        return Err(reject(
            Code::OutOfRange,
            format!(
                "time: must be seconds since the UNIX epoch (>= 0), got {}",
                batch.time
            ),
        ));
    }
    if batch.detections.len() > limits.max_detections {
        return Err(reject(
            Code::TooManyDetections,
            format!(
                "detections: {} detections exceed server.limits.max_detections = {}",
                batch.detections.len(),
                limits.max_detections
            ),
        ));
    }
    let shape = match sensors[index].kind {
        SensorKind::Cartesian { .. } => Shape::Cartesian,
        SensorKind::Polar {
            sigma_range_rate: None,
            ..
        } => Shape::Polar,
        SensorKind::Polar {
            sigma_range_rate: Some(_),
            ..
        } => Shape::PolarRate,
    };
    let mut out = Vec::with_capacity(batch.detections.len());
    for (i, d) in batch.detections.iter().enumerate() {
        out.push(convert_detection(i, d, shape).map_err(|(code, msg)| reject(code, msg))?);
    }
    Ok(Scan {
        sensor: index,
        time: batch.time,
        tag: batch.seq,
        detections: out,
    })
}

fn finite(i: usize, field: &str, v: f64) -> Result<f64, (Code, String)> {
    if v.is_finite() {
        Ok(v)
    } else {
        Err((
            Code::NonFinite,
            format!("detections[{i}].{field}: must be finite, got {v}"),
        ))
    }
}

/// What a sensor's detections must look like.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
enum Shape {
    Cartesian,
    Polar,
    /// Polar with range rate configured (`noise.range_rate`): every detection carries it.
    PolarRate,
}

fn convert_detection(
    i: usize,
    d: &DetectionWire,
    shape: Shape,
) -> Result<Measurement, (Code, String)> {
    if let Some(snr) = d.snr_db {
        finite(i, "snr_db", snr)?;
    }
    if shape != Shape::Cartesian {
        if let Some(field) = [("x", d.x), ("y", d.y)]
            .iter()
            .find_map(|(n, v)| v.map(|_| *n))
        {
            return Err((
                Code::Schema,
                format!(
                    "detections[{i}].{field}: this sensor is polar; a detection is {{\"range\": m, \"bearing\": deg}}, not x/y"
                ),
            ));
        }
        let missing = |f: &str| {
            (
                Code::Schema,
                format!("detections[{i}].{f}: required for a polar sensor"),
            )
        };
        let range = finite(i, "range", d.range.ok_or_else(|| missing("range"))?)?;
        let bearing = finite(i, "bearing", d.bearing.ok_or_else(|| missing("bearing"))?)?;
        if range < 0.0 {
            return Err((
                Code::OutOfRange,
                format!("detections[{i}].range: must be >= 0 m, got {range}"),
            ));
        }
        if !(0.0..360.0).contains(&bearing) {
            return Err((
                Code::OutOfRange,
                format!("detections[{i}].bearing: must be in [0, 360) degrees, got {bearing}"),
            ));
        }
        let range_rate = match d.range_rate {
            Some(r) => Some(finite(i, "range_rate", r)?),
            None if shape == Shape::PolarRate => {
                return Err((
                    Code::Schema,
                    format!(
                        "detections[{i}].range_rate: required, this sensor is configured to measure range rate (noise.range_rate)"
                    ),
                ));
            }
            None => None,
        };
        Ok(Measurement::Polar {
            range,
            bearing_deg: bearing,
            range_rate,
        })
    } else {
        if let Some(field) = [
            ("range", d.range),
            ("bearing", d.bearing),
            ("range_rate", d.range_rate),
        ]
        .iter()
        .find_map(|(n, v)| v.map(|_| *n))
        {
            return Err((
                Code::Schema,
                format!(
                    "detections[{i}].{field}: this sensor is cartesian; a detection is {{\"x\": m, \"y\": m}} in the site frame"
                ),
            ));
        }
        let missing = |f: &str| {
            (
                Code::Schema,
                format!("detections[{i}].{f}: required for a cartesian sensor"),
            )
        };
        let x = finite(i, "x", d.x.ok_or_else(|| missing("x"))?)?;
        let y = finite(i, "y", d.y.ok_or_else(|| missing("y"))?)?;
        Ok(Measurement::Cartesian { x, y })
    }
}

/// The wire name of a track status.
pub fn status_name(s: TrackStatus) -> &'static str {
    match s {
        TrackStatus::Tentative => "tentative",
        TrackStatus::Confirmed => "confirmed",
    }
}

/// Parse a wire status name (`tentative` or `confirmed`).
pub fn parse_status(s: &str) -> Option<TrackStatus> {
    match s {
        "tentative" => Some(TrackStatus::Tentative),
        "confirmed" => Some(TrackStatus::Confirmed),
        _ => None,
    }
}

/// One track of a frame, as serde types (see the module doc for the extra fields).
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct TrackWire {
    /// Track id, never reused within a run.
    pub id: u64,
    /// `tentative` or `confirmed`.
    pub status: String,
    /// East, m.
    pub x: Option<f64>,
    /// North, m.
    pub y: Option<f64>,
    /// East velocity, m/s.
    pub vx: Option<f64>,
    /// North velocity, m/s.
    pub vy: Option<f64>,
    /// Time of the last detection used, s since the epoch.
    pub last_update: Option<f64>,
    /// Existence probability.
    pub existence: Option<f64>,
    /// Ids of the sensors that contributed.
    pub sensors: Vec<String>,
    /// Upper triangle of the 4×4 covariance, row-major (see the module doc).
    pub cov: Vec<Option<f64>>,
}

/// One track frame as serde types: the reference for [`write_frame`] and the type consumers
/// (tests, tools) may deserialise frames into.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct FrameWire {
    /// Frame time, s since the epoch (the batch's time).
    pub time: Option<f64>,
    /// The sensor whose batch made this frame.
    pub sensor: String,
    /// That batch's seq.
    pub seq: u64,
    /// Every live track, predicted to `time`.
    pub tracks: Vec<TrackWire>,
    /// Ids of tracks deleted by this batch.
    pub ended: Vec<u64>,
}

fn fin(v: f64) -> Option<f64> {
    v.is_finite().then_some(v)
}

impl FrameWire {
    /// The frame of `picture`; `ids` maps sensor indices to ids.
    pub fn from_picture(picture: &Picture, ids: &[String]) -> Self {
        FrameWire {
            time: fin(picture.time),
            sensor: ids.get(picture.sensor).cloned().unwrap_or_default(),
            seq: picture.tag,
            tracks: picture
                .tracks
                .iter()
                .map(|t| TrackWire {
                    id: t.id,
                    status: status_name(t.status).to_string(),
                    x: fin(t.state[0]),
                    y: fin(t.state[1]),
                    vx: fin(t.state[2]),
                    vy: fin(t.state[3]),
                    last_update: fin(t.last_update),
                    existence: fin(t.existence),
                    sensors: t
                        .sensors
                        .iter()
                        .map(|s| ids.get(s).cloned().unwrap_or_default())
                        .collect(),
                    cov: upper_triangle(&t.covariance).map(fin).to_vec(),
                })
                .collect(),
            ended: picture.ended.clone(),
        }
    }
}

/// The 10 upper-triangle entries of a 4×4 matrix, row-major.
pub fn upper_triangle(m: &[[f64; 4]; 4]) -> [f64; 10] {
    [
        m[0][0], m[0][1], m[0][2], m[0][3], m[1][1], m[1][2], m[1][3], m[2][2], m[2][3], m[3][3],
    ]
}

fn push_f64(out: &mut String, v: f64) {
    if v.is_finite() {
        out.push_str(ryu::Buffer::new().format_finite(v));
    } else {
        out.push_str("null");
    }
}

fn push_u64(out: &mut String, v: u64) {
    out.push_str(itoa::Buffer::new().format(v));
}

/// Append `s` as a JSON string literal (quotes, backslashes and control characters escaped).
pub fn push_json_str(out: &mut String, s: &str) {
    out.push('"');
    if !s.bytes().any(|b| b < 0x20 || b == b'"' || b == b'\\') {
        // Fast path: nothing to escape (sensor ids are validated to be plain ASCII).
        out.push_str(s);
        out.push('"');
        return;
    }
    for c in s.chars() {
        match c {
            '"' => out.push_str("\\\""),
            '\\' => out.push_str("\\\\"),
            '\n' => out.push_str("\\n"),
            '\r' => out.push_str("\\r"),
            '\t' => out.push_str("\\t"),
            '\u{08}' => out.push_str("\\b"),
            '\u{0c}' => out.push_str("\\f"),
            c if (c as u32) < 0x20 => {
                out.push_str("\\u00");
                const HEX: &[u8; 16] = b"0123456789abcdef";
                out.push(HEX[(c as usize) >> 4] as char);
                out.push(HEX[(c as usize) & 0xf] as char);
            }
            c => out.push(c),
        }
    }
    out.push('"');
}

/// Which tracks of a picture a frame lists.
pub trait TrackFilter {
    /// Whether track `t` is listed.
    fn keep(&self, t: &filter_core::tracker::TrackView) -> bool;
}

/// The filter that keeps every track.
#[derive(Debug, Clone, Copy, Default)]
pub struct AllTracks;

impl TrackFilter for AllTracks {
    fn keep(&self, _: &filter_core::tracker::TrackView) -> bool {
        true
    }
}

/// Append the frame of `picture` to `out` (cleared first), listing the tracks `filter` keeps.
/// The bytes equal `serde_json::to_string(&FrameWire::from_picture(..))` when every track is kept.
pub fn write_frame(out: &mut String, picture: &Picture, ids: &[String], filter: &impl TrackFilter) {
    out.clear();
    out.push_str("{\"time\":");
    push_f64(out, picture.time);
    out.push_str(",\"sensor\":");
    push_json_str(out, ids.get(picture.sensor).map_or("", String::as_str));
    out.push_str(",\"seq\":");
    push_u64(out, picture.tag);
    out.push_str(",\"tracks\":[");
    let mut first = true;
    for t in picture.tracks.iter().filter(|t| filter.keep(t)) {
        if !first {
            out.push(',');
        }
        first = false;
        write_track(out, t, ids);
    }
    out.push_str("],\"ended\":[");
    for (i, id) in picture.ended.iter().enumerate() {
        if i > 0 {
            out.push(',');
        }
        push_u64(out, *id);
    }
    out.push_str("]}");
}

/// Append one track object (the `tracks[]` element of a frame) to `out`.
pub fn write_track(out: &mut String, t: &filter_core::tracker::TrackView, ids: &[String]) {
    out.push_str("{\"id\":");
    push_u64(out, t.id);
    out.push_str(",\"status\":\"");
    out.push_str(status_name(t.status));
    for (key, v) in [
        ("\",\"x\":", t.state[0]),
        (",\"y\":", t.state[1]),
        (",\"vx\":", t.state[2]),
        (",\"vy\":", t.state[3]),
        (",\"last_update\":", t.last_update),
        (",\"existence\":", t.existence),
    ] {
        out.push_str(key);
        push_f64(out, v);
    }
    out.push_str(",\"sensors\":[");
    for (i, s) in t.sensors.iter().enumerate() {
        if i > 0 {
            out.push(',');
        }
        push_json_str(out, ids.get(s).map_or("", String::as_str));
    }
    out.push_str("],\"cov\":[");
    for (i, v) in upper_triangle(&t.covariance).iter().enumerate() {
        if i > 0 {
            out.push(',');
        }
        push_f64(out, *v);
    }
    out.push_str("]}");
}

/// The acknowledgement reply `{"ack": seq}`.
pub fn ack_json(seq: u64) -> String {
    let mut s = String::with_capacity(24);
    s.push_str("{\"ack\":");
    push_u64(&mut s, seq);
    s.push('}');
    s
}

/// The marker sent to a frame subscriber that lagged: `{"skipped": n}` frames were dropped.
pub fn skipped_json(n: u64) -> String {
    let mut s = String::with_capacity(24);
    s.push_str("{\"skipped\":");
    push_u64(&mut s, n);
    s.push('}');
    s
}

#[cfg(test)]
mod tests {
    use super::*;
    use filter_core::tracker::{FieldOfView, TrackView};

    fn sensors() -> Vec<SensorConfig> {
        vec![
            SensorConfig {
                id: "east-pier-radar".into(),
                kind: SensorKind::Polar {
                    x: 0.0,
                    y: 0.0,
                    sigma_range: 10.0,
                    sigma_bearing_deg: 0.5,
                    sigma_range_rate: None,
                },
                fov: FieldOfView::Sector {
                    min_range: 0.0,
                    max_range: 5000.0,
                    bearing_start_deg: 0.0,
                    bearing_extent_deg: 360.0,
                },
                detection_probability: 0.9,
                clutter_rate: 20.0,
                birth_rate: 0.1,
            },
            SensorConfig {
                id: "mole-camera".into(),
                kind: SensorKind::Cartesian { sigma: 3.0 },
                fov: FieldOfView::Rect {
                    x_min: 0.0,
                    x_max: 100.0,
                    y_min: 0.0,
                    y_max: 100.0,
                },
                detection_probability: 0.8,
                clutter_rate: 0.5,
                birth_rate: 0.1,
            },
            SensorConfig {
                id: "doppler-radar".into(),
                kind: SensorKind::Polar {
                    x: 0.0,
                    y: 0.0,
                    sigma_range: 10.0,
                    sigma_bearing_deg: 0.5,
                    sigma_range_rate: Some(0.3),
                },
                fov: FieldOfView::Sector {
                    min_range: 0.0,
                    max_range: 5000.0,
                    bearing_start_deg: 0.0,
                    bearing_extent_deg: 360.0,
                },
                detection_probability: 0.9,
                clutter_rate: 20.0,
                birth_rate: 0.1,
            },
        ]
    }

    const LIMITS: DecodeLimits = DecodeLimits { max_detections: 3 };

    fn reject(text: &str) -> Rejection {
        match decode_batch(text, &sensors(), LIMITS) {
            Ok(s) => panic!("accepted {text}: {s:?}"),
            Err(r) => r,
        }
    }

    /// check(input, code, fragments the message must contain)
    fn check(text: &str, code: Code, fragments: &[&str]) {
        let r = reject(text);
        assert_eq!(r.code, code, "{text} -> {}", r.message);
        for f in fragments {
            assert!(r.message.contains(f), "message {:?} lacks {f:?}", r.message);
        }
    }

    #[test]
    fn contract_example_batch_decodes() {
        // The example batch of the wire contract, section "Detection batch".
        let text = r#"{"sensor": "east-pier-radar", "seq": 4711, "time": 1764600000.25,
 "detections": [
   {"range": 1834.2, "bearing": 47.25},
   {"range": 920.0, "bearing": 301.5, "range_rate": -2.1, "snr_db": 14.0}
 ]}"#;
        let scan = decode_batch(text, &sensors(), LIMITS).unwrap();
        assert_eq!(scan.sensor, 0);
        assert_eq!(scan.tag, 4711);
        assert_eq!(scan.time, 1764600000.25);
        assert_eq!(
            scan.detections,
            vec![
                Measurement::Polar {
                    range: 1834.2,
                    bearing_deg: 47.25,
                    range_rate: None
                },
                Measurement::Polar {
                    range: 920.0,
                    bearing_deg: 301.5,
                    range_rate: Some(-2.1)
                },
            ]
        );
    }

    #[test]
    fn cartesian_and_empty_batches_decode() {
        let scan = decode_batch(
            r#"{"sensor":"mole-camera","seq":1,"time":5,"detections":[{"x":1.5,"y":-2}]}"#,
            &sensors(),
            LIMITS,
        )
        .unwrap();
        assert_eq!(
            scan.detections,
            vec![Measurement::Cartesian { x: 1.5, y: -2.0 }]
        );
        let scan = decode_batch(
            r#"{"sensor":"mole-camera","seq":2,"time":6,"detections":[],"extra":"ignored"}"#,
            &sensors(),
            LIMITS,
        )
        .unwrap();
        assert!(scan.detections.is_empty());
    }

    #[test]
    fn malformed_json_is_named() {
        check(
            "{\"sensor\": ",
            Code::MalformedJson,
            &["batch (seq unknown)", "not valid JSON"],
        );
        check("not json", Code::MalformedJson, &["not valid JSON"]);
        // NaN is not a JSON literal.
        check(
            r#"{"sensor":"mole-camera","seq":3,"time":1,"detections":[{"x":NaN,"y":0}]}"#,
            Code::MalformedJson,
            &["not valid JSON"],
        );
        check(
            r#"{"sensor":"mole-camera","seq":3,"time":1,"detections":[]} trailing"#,
            Code::MalformedJson,
            &["batch seq 3", "trailing"],
        );
    }

    #[test]
    fn schema_errors_name_the_field() {
        check(
            r#"{"sensor":"mole-camera","time":1,"detections":[]}"#,
            Code::Schema,
            &[
                "batch (seq unknown) from \"mole-camera\"",
                "missing field `seq`",
            ],
        );
        check(
            r#"{"sensor":"mole-camera","seq":-4,"time":1,"detections":[]}"#,
            Code::Schema,
            &["seq: invalid value: integer `-4`"],
        );
        check(
            r#"{"sensor":"east-pier-radar","seq":9,"time":1,"detections":[{"range":1,"bearing":2},{"range":"far","bearing":3}]}"#,
            Code::Schema,
            &[
                "batch seq 9 from \"east-pier-radar\"",
                "detections[1].range: invalid type: string \"far\"",
            ],
        );
        check(
            r#"{"sensor":"east-pier-radar","seq":9,"time":1,"detections":[{"range":1}]}"#,
            Code::Schema,
            &["detections[0].bearing: required for a polar sensor"],
        );
        check(
            r#"{"sensor":"east-pier-radar","seq":9,"time":1,"detections":[{"x":1,"y":2}]}"#,
            Code::Schema,
            &["detections[0].x: this sensor is polar"],
        );
        check(
            r#"{"sensor":"mole-camera","seq":9,"time":1,"detections":[{"x":1,"y":2},{"x":1,"bearing":2}]}"#,
            Code::Schema,
            &["detections[1].bearing: this sensor is cartesian"],
        );
        check(
            r#"{"sensor":"mole-camera","seq":9,"time":1,"detections":[{"x":1}]}"#,
            Code::Schema,
            &["detections[0].y: required for a cartesian sensor"],
        );
        check(r#"[1,2]"#, Code::Schema, &["batch (seq unknown)"]);
    }

    #[test]
    fn overflowing_number_is_non_finite_and_names_the_field() {
        check(
            r#"{"sensor":"east-pier-radar","seq":12,"time":1,"detections":[{"range":1,"bearing":2},{"range":1e999,"bearing":3}]}"#,
            Code::NonFinite,
            &["detections[1].range", "finite"],
        );
        check(
            r#"{"sensor":"mole-camera","seq":12,"time":1e400,"detections":[]}"#,
            Code::NonFinite,
            &["time", "finite"],
        );
    }

    #[test]
    fn prefilter_flags_every_text_the_typed_decoder_could_let_through() {
        // The rule of JSON numbers (RFC 8259 §6): an exponent follows a digit; without one an
        // overflow needs 309 integer digits (f64::MAX ≈ 1.8e308, the IEEE 754 binary64 limit).
        let long = format!("{{\"x\":{}}}", "9".repeat(309));
        let short = format!("{{\"x\":{}}}", "9".repeat(308));
        assert_eq!(
            short[5..]
                .trim_end_matches('}')
                .parse::<f64>()
                .map(f64::is_finite),
            Ok(true)
        );
        assert_eq!(
            long[5..]
                .trim_end_matches('}')
                .parse::<f64>()
                .map(f64::is_finite),
            Ok(false)
        );
        for (text, flagged) in [
            (r#"{"x":1e999}"#, true),
            (r#"{"x":-2.5E+400}"#, true),
            (r#"{"x":1.5e3}"#, true),
            (long.as_str(), true),
            (short.as_str(), false),
            (r#"{"x":1,"s":"\ud800"}"#, true),
            ("{\"x\":1,\"s\":\"a\u{1}b\"}", true),
            ("{\"x\":1,\n\t\"y\":2}", false),
            (
                r#"{"sensor":"east-pier-radar","seq":1,"time":1764600000.25,"detections":[{"range":12.5,"bearing":3}]}"#,
                false,
            ),
        ] {
            assert_eq!(needs_full_reading(text), flagged, "{text}");
        }
    }

    #[test]
    fn overflowing_number_in_an_extension_field_is_non_finite() {
        // Found by the ingest_batch fuzz target (fuzz/regressions/ingest_batch/): serde skipped
        // the unknown field without reading its number, so the batch was accepted.
        check(
            r#"{"sensor":"mole-camera","seq":13,"time":1,"detections":[{"x":1,"y":2,"note":{"gain":[1,-1e999]}}]}"#,
            Code::NonFinite,
            &[
                "batch seq 13 from \"mole-camera\"",
                "detections[0].note.gain[1]: every number must be finite",
            ],
        );
        let r = reject(r#"{"sensor":"mole-camera","seq":14,"time":1,"detections":[],"x":1e999}"#);
        assert_eq!(
            (r.code, r.seq, r.sensor),
            (Code::NonFinite, Some(14), Some(1))
        );
        // Finite extension numbers, tiny ones that round to zero included, are fine.
        decode_batch(
            r#"{"sensor":"mole-camera","seq":15,"time":1,"detections":[],"gain":[1e-400,2.5,-3]}"#,
            &sensors(),
            LIMITS,
        )
        .unwrap();
    }

    #[test]
    fn range_rate_is_required_where_configured() {
        check(
            r#"{"sensor":"doppler-radar","seq":1,"time":1,"detections":[{"range":1,"bearing":2,"range_rate":0.5},{"range":1,"bearing":2}]}"#,
            Code::Schema,
            &["detections[1].range_rate: required", "noise.range_rate"],
        );
        let scan = decode_batch(
            r#"{"sensor":"doppler-radar","seq":1,"time":1,"detections":[{"range":1,"bearing":2,"range_rate":-0.5}]}"#,
            &sensors(),
            LIMITS,
        )
        .unwrap();
        assert_eq!(scan.sensor, 2);
    }

    #[test]
    fn ranges_and_limits() {
        check(
            r#"{"sensor":"east-pier-radar","seq":5,"time":1,"detections":[{"range":1,"bearing":360}]}"#,
            Code::OutOfRange,
            &[
                "batch seq 5",
                "detections[0].bearing: must be in [0, 360) degrees, got 360",
            ],
        );
        check(
            r#"{"sensor":"east-pier-radar","seq":5,"time":1,"detections":[{"range":-1,"bearing":3}]}"#,
            Code::OutOfRange,
            &["detections[0].range: must be >= 0 m, got -1"],
        );
        check(
            r#"{"sensor":"mole-camera","seq":5,"time":-3,"detections":[]}"#,
            Code::OutOfRange,
            &["time: must be seconds since the UNIX epoch"],
        );
        check(
            r#"{"sensor":"mole-camera","seq":6,"time":1,"detections":[{"x":1,"y":1},{"x":1,"y":1},{"x":1,"y":1},{"x":1,"y":1}]}"#,
            Code::TooManyDetections,
            &[
                "batch seq 6",
                "4 detections exceed server.limits.max_detections = 3",
            ],
        );
        check(
            r#"{"sensor":"lighthouse","seq":7,"time":1,"detections":[]}"#,
            Code::UnknownSensor,
            &[
                "batch seq 7",
                "\"lighthouse\" is not configured",
                "east-pier-radar, mole-camera",
            ],
        );
        let r = reject(r#"{"sensor":"lighthouse","seq":7,"time":1,"detections":[]}"#);
        assert_eq!((r.seq, r.sensor), (Some(7), None));
        let r = reject(r#"{"sensor":"mole-camera","seq":"7","time":1,"detections":[]}"#);
        assert_eq!((r.seq, r.sensor), (None, Some(1)));
        let r = reject(r#"{"sensor":"mole-camera","seq":8,"time":-1,"detections":[]}"#);
        assert_eq!((r.seq, r.sensor), (Some(8), Some(1)));
    }

    fn picture() -> Picture {
        let mut cov = [[0.0; 4]; 4];
        for (i, row) in cov.iter_mut().enumerate() {
            for (j, v) in row.iter_mut().enumerate() {
                *v = 1.0 / (1.0 + i as f64 + j as f64);
            }
        }
        Picture {
            time: 1764600000.25,
            sensor: 0,
            tag: 4711,
            tracks: vec![
                TrackView {
                    id: 12,
                    status: TrackStatus::Confirmed,
                    state: [1251.3, 1240.8, -3.1, 4.4],
                    covariance: cov,
                    existence: 0.999,
                    last_update: 1764600000.25,
                    sensors: [0, 1].into_iter().collect(),
                },
                TrackView {
                    id: 31,
                    status: TrackStatus::Tentative,
                    state: [-80.2, 655.0, 0.0, 1e-7],
                    covariance: cov,
                    existence: 0.4,
                    last_update: 1764599998.0,
                    sensors: [1].into_iter().collect(),
                },
            ],
            ended: vec![7, 9],
            stats: Default::default(),
        }
    }

    #[test]
    fn hand_written_frame_equals_serde_json_bytes() {
        // Reference: serde_json serialising the serde types of the same frame.
        let ids = vec!["east-pier-radar".to_string(), "mole \"cam\"\n".to_string()];
        let p = picture();
        let mut out = String::new();
        write_frame(&mut out, &p, &ids, &AllTracks);
        let reference = serde_json::to_string(&FrameWire::from_picture(&p, &ids)).unwrap();
        assert_eq!(out, reference);
        let back: FrameWire = serde_json::from_str(&out).unwrap();
        assert_eq!(back.tracks[0].cov[1], Some(0.5));
        assert_eq!(back.tracks[1].vy, Some(1e-7));
        assert_eq!(back.ended, vec![7, 9]);
    }

    #[test]
    fn non_finite_frame_numbers_become_null_like_serde_json() {
        let ids = vec!["east-pier-radar".to_string()];
        let mut p = picture();
        p.tracks[0].state[0] = f64::NAN;
        p.tracks[0].sensors = [0].into_iter().collect();
        p.tracks[1].sensors = [0].into_iter().collect();
        let mut out = String::new();
        write_frame(&mut out, &p, &ids, &AllTracks);
        assert_eq!(
            out,
            serde_json::to_string(&FrameWire::from_picture(&p, &ids)).unwrap()
        );
        assert!(out.contains("\"x\":null"));
    }

    #[test]
    fn filtered_frame_lists_only_kept_tracks() {
        struct Confirmed;
        impl TrackFilter for Confirmed {
            fn keep(&self, t: &TrackView) -> bool {
                t.status == TrackStatus::Confirmed
            }
        }
        let ids = vec!["a".to_string(), "b".to_string()];
        let mut out = String::new();
        write_frame(&mut out, &picture(), &ids, &Confirmed);
        let v: serde_json::Value = serde_json::from_str(&out).unwrap();
        assert_eq!(v["tracks"].as_array().unwrap().len(), 1);
        assert_eq!(v["tracks"][0]["id"], 12);
    }

    #[test]
    fn replies() {
        assert_eq!(ack_json(4711), r#"{"ack":4711}"#);
        assert_eq!(skipped_json(3), r#"{"skipped":3}"#);
        let mut s = String::new();
        push_json_str(&mut s, "a\u{1}b");
        assert_eq!(s, serde_json::to_string("a\u{1}b").unwrap());
    }
}
