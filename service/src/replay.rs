//! `plotweave replay`: send a recording to a live service's `/v1/ingest`, one WebSocket
//! connection per sensor, each with that sensor's token.
//!
//! **Order is kept across sensors**: each batch is sent only after the previous one (of any
//! sensor) was answered, so the service sees the batches in the recording's order, which is
//! the order `batch` uses, and the tracks come out the same. `--speed F` additionally waits until
//! the batch's recorded moment, scaled by `F` (2 = twice as fast); the clock is the recorded
//! arrival time `recv` when every selected line carries it, else the batch `time`. `--speed max`
//! sends as fast as the acknowledgements come back. A `rate_limited` answer is the service's
//! pacing, not a refusal: the batch is sent again after a short pause (counted as a retry).
//! Every other error answer counts as a rejection and is reported with its line number.
//!
//! `--shift-to-now` moves every batch `time` by one offset so that the first selected batch
//! is stamped with the moment the replay starts (for services whose picture is wall-clock
//! based); `recv` is never sent (the receiving service records its own).

use std::collections::BTreeMap;
use std::io::Write;
use std::path::PathBuf;
use std::str::FromStr;
use std::time::{Duration, Instant};

use futures_util::{SinkExt, StreamExt};
use tokio_tungstenite::tungstenite::Message;
use tokio_tungstenite::tungstenite::client::IntoClientRequest;

use crate::error::Error;
use crate::record::{Line, RecordingReader};

/// How fast to replay.
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum Speed {
    /// As fast as acknowledgements allow.
    Max,
    /// Recorded spacing divided by this factor (> 0).
    Factor(f64),
}

impl FromStr for Speed {
    type Err = String;
    fn from_str(s: &str) -> Result<Self, String> {
        if s == "max" {
            return Ok(Speed::Max);
        }
        match s.parse::<f64>() {
            Ok(f) if f.is_finite() && f > 0.0 => Ok(Speed::Factor(f)),
            _ => Err(format!(
                "must be a factor > 0 (1 = recorded pace) or \"max\", got {s:?}"
            )),
        }
    }
}

/// What to replay and where.
#[derive(Debug, Clone)]
pub struct ReplayOptions {
    /// The recording.
    pub input: PathBuf,
    /// `ws://HOST:PORT/v1/ingest`.
    pub to: String,
    /// Token per sensor id from the command line; a sensor not listed takes
    /// `PLOTWEAVE_TOKEN_<ID>` from the environment.
    pub tokens: BTreeMap<String, String>,
    /// Pace.
    pub speed: Speed,
    /// Re-stamp times so the first batch is now.
    pub shift_to_now: bool,
    /// Only these sensors (empty = all).
    pub sensors: Vec<String>,
    /// Only batches with `time >= from` (UNIX s).
    pub from: Option<f64>,
    /// Only batches with `time < until` (UNIX s).
    pub until: Option<f64>,
    /// Draw a progress bar on standard error.
    pub progress: bool,
}

/// Counts of a replay.
#[derive(Debug, Clone, Copy, Default, PartialEq)]
pub struct ReplaySummary {
    /// Lines of the recording.
    pub lines: usize,
    /// Lines reported and skipped (unreadable).
    pub skipped: usize,
    /// Batches selected by the sensor and time filters.
    pub selected: usize,
    /// Batches acknowledged.
    pub acked: usize,
    /// Batches refused.
    pub rejected: usize,
    /// Re-sends after `rate_limited`.
    pub retried: usize,
    /// Sensor connections used.
    pub connections: usize,
    /// Wall time, s.
    pub seconds: f64,
}

struct Entry {
    number: usize,
    sensor: String,
    seq: u64,
    time: f64,
    recv: Option<f64>,
    value: serde_json::Map<String, serde_json::Value>,
}

/// Longest wait for one answer before the replay gives up.
pub const ANSWER_TIMEOUT: Duration = Duration::from_secs(30);

/// Re-sends of one batch answered `rate_limited` before it counts as rejected.
pub const MAX_RETRIES: usize = 400;

type Ws =
    tokio_tungstenite::WebSocketStream<tokio_tungstenite::MaybeTlsStream<tokio::net::TcpStream>>;

/// Replay `opts.input` to `opts.to`; bad lines and refused batches are reported on `report`.
///
/// # Errors
/// [`Error::Io`] if the recording cannot be read; [`Error::Usage`] if nothing is selected, the
/// server cannot be reached, refuses a connection, closes it, or does not answer in time.
pub async fn replay(opts: &ReplayOptions, report: &mut dyn Write) -> Result<ReplaySummary, Error> {
    let started = Instant::now();
    let mut summary = ReplaySummary::default();
    let file = std::fs::File::open(&opts.input).map_err(|e| {
        Error::io(
            format!("cannot open the recording {}", opts.input.display()),
            e,
        )
    })?;
    let mut reader = RecordingReader::new(std::io::BufReader::with_capacity(1 << 16, file));
    let mut entries = Vec::new();
    let say = |report: &mut dyn Write, s: String| {
        writeln!(report, "{s}").map_err(|e| Error::io("cannot write the report", e))
    };
    while let Some(line) = reader.next_line()? {
        let (number, text) = match line {
            Line::Bad { number, message } => {
                summary.skipped += 1;
                say(report, format!("line {number}: {message}; skipped"))?;
                continue;
            }
            Line::Batch { number, text } => (number, text),
        };
        match parse_entry(number, text) {
            Ok(e) => {
                let keep = (opts.sensors.is_empty() || opts.sensors.contains(&e.sensor))
                    && opts.from.is_none_or(|f| e.time >= f)
                    && opts.until.is_none_or(|u| e.time < u);
                if keep {
                    entries.push(e);
                }
            }
            Err(msg) => {
                summary.skipped += 1;
                say(report, format!("line {number}: {msg}; skipped"))?;
            }
        }
    }
    summary.lines = reader.lines();
    summary.selected = entries.len();
    if entries.is_empty() {
        return Err(Error::Usage(format!(
            "no batches to replay: {} has {} lines, none selected by the sensor and time filters",
            opts.input.display(),
            summary.lines
        )));
    }

    // One connection per sensor, opened up front so an unreachable server fails fast.
    let mut order: Vec<String> = Vec::new();
    for e in &entries {
        if !order.contains(&e.sensor) {
            order.push(e.sensor.clone());
        }
    }
    let mut conns: BTreeMap<String, Ws> = BTreeMap::new();
    for id in &order {
        let token = opts
            .tokens
            .get(id)
            .cloned()
            .or_else(|| std::env::var(crate::config::token_env_var(id)).ok());
        conns.insert(id.clone(), connect(&opts.to, id, token.as_ref()).await?);
    }
    summary.connections = conns.len();

    let use_recv = entries.iter().all(|e| e.recv.is_some());
    let clock = |e: &Entry| {
        if use_recv {
            e.recv.unwrap_or(e.time)
        } else {
            e.time
        }
    };
    let clock0 = clock(&entries[0]);
    let shift = if opts.shift_to_now {
        crate::record::unix_now() - entries[0].time
    } else {
        0.0
    };
    let bar = if opts.progress {
        indicatif::ProgressBar::new(entries.len() as u64)
    } else {
        indicatif::ProgressBar::hidden()
    };
    bar.set_style(
        indicatif::ProgressStyle::with_template(
            "{bar:40} {pos}/{len} batches  {per_sec}  {msg}  eta {eta}",
        )
        .unwrap_or_else(|_| indicatif::ProgressStyle::default_bar()),
    );
    bar.set_message("0 rejected");
    let t0 = tokio::time::Instant::now();
    for e in &mut entries {
        if let Speed::Factor(f) = opts.speed {
            let due = t0 + Duration::from_secs_f64(((clock(e) - clock0) / f).max(0.0));
            tokio::time::sleep_until(due).await;
        }
        e.value.remove("recv");
        if shift != 0.0
            && let Some(n) = serde_json::Number::from_f64(e.time + shift)
        {
            e.value.insert("time".into(), serde_json::Value::Number(n));
        }
        let text = serde_json::Value::Object(std::mem::take(&mut e.value)).to_string();
        let Some(ws) = conns.get_mut(&e.sensor) else {
            continue;
        };
        let mut attempt = 0;
        loop {
            let reply = exchange(ws, &text, &e.sensor, &opts.to).await?;
            if reply.get("ack").is_some() {
                summary.acked += 1;
                break;
            }
            let err = &reply["error"];
            let code = err["code"].as_str().unwrap_or("unknown");
            if code == "rate_limited" && attempt < MAX_RETRIES {
                attempt += 1;
                summary.retried += 1;
                tokio::time::sleep(Duration::from_millis(20 * attempt.min(10) as u64)).await;
                continue;
            }
            summary.rejected += 1;
            bar.set_message(format!("{} rejected", summary.rejected));
            let msg = format!(
                "line {}: batch seq {} from {:?} rejected: {} ({code})",
                e.number,
                e.seq,
                e.sensor,
                err["message"].as_str().unwrap_or("no message")
            );
            bar.suspend(|| say(report, msg))?;
            break;
        }
        bar.inc(1);
    }
    bar.finish_and_clear();
    for (_, mut ws) in conns {
        let _ = ws.close(None).await;
    }
    summary.seconds = started.elapsed().as_secs_f64();
    Ok(summary)
}

fn parse_entry(number: usize, text: &str) -> Result<Entry, String> {
    let _ = number;
    let v: serde_json::Value =
        serde_json::from_str(text).map_err(|e| format!("not valid JSON: {e}"))?;
    let serde_json::Value::Object(value) = v else {
        return Err("not a detection batch (a JSON object)".into());
    };
    let sensor = value
        .get("sensor")
        .and_then(|s| s.as_str())
        .ok_or("sensor: required (a string)")?
        .to_string();
    let seq = value
        .get("seq")
        .and_then(serde_json::Value::as_u64)
        .ok_or("seq: required (an unsigned integer)")?;
    let time = value
        .get("time")
        .and_then(serde_json::Value::as_f64)
        .ok_or("time: required (a number)")?;
    let recv = value.get("recv").and_then(serde_json::Value::as_f64);
    Ok(Entry {
        number,
        sensor,
        seq,
        time,
        recv,
        value,
    })
}

async fn connect(url: &str, sensor: &str, token: Option<&String>) -> Result<Ws, Error> {
    let mut req = url
        .into_client_request()
        .map_err(|e| Error::Usage(format!("--to {url:?}: not a WebSocket URL ({e})")))?;
    if let Some(t) = token {
        let value = format!("Bearer {t}").parse().map_err(|_| {
            Error::Usage(format!(
                "the token of sensor {sensor:?} is not valid in an HTTP header"
            ))
        })?;
        req.headers_mut().insert("authorization", value);
    }
    let connecting = tokio_tungstenite::connect_async(req);
    match tokio::time::timeout(ANSWER_TIMEOUT, connecting).await {
        Err(_) => Err(Error::Usage(format!(
            "cannot connect to {url} for sensor {sensor:?}: no answer within {} s",
            ANSWER_TIMEOUT.as_secs()
        ))),
        Ok(Ok((ws, _))) => Ok(ws),
        Ok(Err(tokio_tungstenite::tungstenite::Error::Http(resp))) => {
            let body = resp
                .body()
                .as_ref()
                .map(|b| String::from_utf8_lossy(b).into_owned())
                .unwrap_or_default();
            let hint = if token.is_none() {
                format!(
                    " (no token given for this sensor: pass --token {sensor}=TOKEN or set {})",
                    crate::config::token_env_var(sensor)
                )
            } else {
                String::new()
            };
            Err(Error::Usage(format!(
                "{url} refused the connection for sensor {sensor:?}: HTTP {} {body}{hint}",
                resp.status().as_u16()
            )))
        }
        Ok(Err(e)) => Err(Error::Usage(format!(
            "cannot connect to {url} for sensor {sensor:?}: {e} (is the service running there?)"
        ))),
    }
}

/// Send one batch and wait for its answer (a JSON object).
async fn exchange(
    ws: &mut Ws,
    text: &str,
    sensor: &str,
    url: &str,
) -> Result<serde_json::Value, Error> {
    let lost = |what: String| {
        Error::Usage(format!(
            "the connection to {url} for sensor {sensor:?} failed: {what}"
        ))
    };
    ws.send(Message::text(text))
        .await
        .map_err(|e| lost(e.to_string()))?;
    loop {
        let m = tokio::time::timeout(ANSWER_TIMEOUT, ws.next())
            .await
            .map_err(|_| lost(format!("no answer within {} s", ANSWER_TIMEOUT.as_secs())))?;
        match m {
            None => return Err(lost("closed by the server".into())),
            Some(Err(e)) => return Err(lost(e.to_string())),
            Some(Ok(Message::Text(t))) => {
                return serde_json::from_str(t.as_str())
                    .map_err(|e| lost(format!("answer is not JSON ({e}): {t}")));
            }
            Some(Ok(Message::Close(f))) => {
                return Err(lost(format!(
                    "closed by the server{}",
                    f.map(|f| format!(" ({} {})", u16::from(f.code), f.reason))
                        .unwrap_or_default()
                )));
            }
            Some(Ok(_)) => continue,
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn speed_parses() {
        assert_eq!("max".parse::<Speed>(), Ok(Speed::Max));
        assert_eq!("2.5".parse::<Speed>(), Ok(Speed::Factor(2.5)));
        assert!("0".parse::<Speed>().unwrap_err().contains("got \"0\""));
        assert!("fast".parse::<Speed>().is_err());
    }

    #[test]
    fn entries_need_sensor_seq_and_time() {
        assert!(parse_entry(1, r#"{"sensor":"a","seq":1,"time":2.0,"detections":[]}"#).is_ok());
        assert_eq!(
            parse_entry(1, r#"{"sensor":"a","time":2.0}"#).err(),
            Some("seq: required (an unsigned integer)".to_string())
        );
        assert!(parse_entry(1, "[1]").is_err());
    }
}
