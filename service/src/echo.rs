//! The detection echo (`GET /v1/detections`, WebSocket): the detections of every accepted
//! scan, converted to the site frame, for live displays such as the situation page
//! ([`crate::page`]).
//!
//! One message per scan, in the order the engine takes scans:
//!
//! ```json
//! {"sensor": "kestrel-radar", "seq": 17, "time": 1764600042.7,
//!  "detections": [{"x": -1993.2, "y": 1507.9}, {"x": 310.4, "y": 2875.0}]}
//! ```
//!
//! `x`/`y` are east/north in metres in the site frame; a polar detection (range r, bearing b
//! clockwise from north) of a sensor at (xₛ, yₛ) becomes x = xₛ + r sin b, y = yₛ + r cos b.
//! Clutter and target detections are not told apart: the echo shows what the sensor reported.
//!
//! Cost: the engine thread converts and serialises a scan **only while someone listens**
//! ([`crate::pipeline::Hub`] checks its receiver count first); the text is then shared by every
//! listener. Lag policy: the broadcast holds [`DETECTION_ECHO_BUFFER`] scans per listener; a
//! listener that falls further behind loses the oldest and is told `{"skipped": N}`; **slow
//! listeners never block the engine**. Authorisation is that of `/v1/frames` (the read token).

use std::net::SocketAddr;

use axum::extract::ws::{CloseFrame, Message, Utf8Bytes, WebSocketUpgrade, close_code};
use axum::extract::{ConnectInfo, State};
use axum::http::HeaderMap;
use axum::response::{IntoResponse, Response};
use filter_core::tracker::{Measurement, Scan, SensorConfig, SensorKind};
use futures_util::{Sink, SinkExt, Stream, StreamExt};
use tokio::sync::broadcast::error::RecvError;

use crate::keepalive::{Keepalive, give_up};
use crate::metrics::CloseReason;
use crate::server::AppState;
use crate::wire;

/// Scans the detection echo buffers per listener; a listener further behind skips the oldest
/// (and is told how many), the engine never waits.
pub const DETECTION_ECHO_BUFFER: usize = 64;

/// Site-frame position (east, north; m) of detection `m` of a sensor of kind `kind`.
///
/// Cartesian detections are already in the site frame. A polar detection at range r (m) and
/// bearing b (degrees clockwise from north) of a sensor at (xₛ, yₛ) is at
/// $$x = x_s + r \sin b, \qquad y = y_s + r \cos b$$
/// (the bearing convention of the wire contract). A measurement whose shape does not match the
/// kind (which admission never lets through) is placed by its own coordinates.
pub fn site_position(m: &Measurement, kind: &SensorKind) -> (f64, f64) {
    match (*m, *kind) {
        (Measurement::Cartesian { x, y }, _) => (x, y),
        (
            Measurement::Polar {
                range, bearing_deg, ..
            },
            SensorKind::Polar { x, y, .. },
        ) => {
            let (s, c) = bearing_deg.to_radians().sin_cos();
            (range.mul_add(s, x), range.mul_add(c, y))
        }
        (
            Measurement::Polar {
                range, bearing_deg, ..
            },
            SensorKind::Cartesian { .. },
        ) => {
            let (s, c) = bearing_deg.to_radians().sin_cos();
            (range * s, range * c)
        }
    }
}

/// Append the echo message of `scan` (see the module doc) to `out`; `sensors` are the
/// tracker's sensors in index order.
pub fn write_echo(out: &mut String, scan: &Scan, sensors: &[SensorConfig]) {
    let Some(sensor) = sensors.get(scan.sensor) else {
        return;
    };
    let mut num = ryu::Buffer::new();
    let mut f = |out: &mut String, v: f64| {
        if v.is_finite() {
            out.push_str(num.format_finite(v));
        } else {
            out.push_str("null");
        }
    };
    out.push_str("{\"sensor\":");
    wire::push_json_str(out, &sensor.id);
    out.push_str(",\"seq\":");
    out.push_str(itoa::Buffer::new().format(scan.tag));
    out.push_str(",\"time\":");
    f(out, scan.time);
    out.push_str(",\"detections\":[");
    for (i, m) in scan.detections.iter().enumerate() {
        if i > 0 {
            out.push(',');
        }
        let (x, y) = site_position(m, &sensor.kind);
        out.push_str("{\"x\":");
        f(out, x);
        out.push_str(",\"y\":");
        f(out, y);
        out.push('}');
    }
    out.push_str("]}");
}

/// `GET /v1/detections`: upgrade to a detection echo session (read token required where one
/// is configured; see [`crate::page`] for how a browser presents it).
pub(crate) async fn detections(
    State(state): State<AppState>,
    ConnectInfo(peer): ConnectInfo<SocketAddr>,
    headers: HeaderMap,
    ws: WebSocketUpgrade,
) -> Response {
    if let Err(r) = crate::http::require_read(&state, &headers, "detections") {
        return r.into_response();
    }
    crate::http::consumer_upgrade(state, peer, ws, "detections", |state, socket| async move {
        let (sink, stream) = socket.split();
        echo_session(state, sink, stream).await
    })
}

/// One echo listener: forward echo messages until the client leaves, the service shuts down
/// or the engine has stopped; Ping the peer and close it when it falls silent
/// ([`crate::keepalive`]). Returns why it ended.
///
/// Written against `Sink`/`Stream` so that it runs on any message transport.
pub(crate) async fn echo_session<S, R>(state: AppState, mut sink: S, mut stream: R) -> CloseReason
where
    S: Sink<Message> + Unpin,
    R: Stream<Item = Result<Message, axum::Error>> + Unpin,
{
    let hub = &state.0.hub;
    let mut rx = hub.subscribe_detections();
    let mut done = hub.done();
    let engine_done = async move {
        let _ = done.wait_for(|d| *d).await;
    };
    tokio::pin!(engine_done);
    let cancel = state.cancel_token();
    let mut alive = Keepalive::new(&state.0.site.server.limits);
    loop {
        tokio::select! {
            biased;
            // The peer first, so a waiting Pong is seen before the idle deadline is judged.
            msg = stream.next() => match msg {
                None | Some(Err(_)) | Some(Ok(Message::Close(_))) => return CloseReason::Peer,
                Some(Ok(_)) => alive.heard(), // listeners have nothing to say but Pongs
            },
            due = alive.due() => match alive.act(due, &mut sink).await {
                Ok(()) => continue,
                Err(why) => return give_up(&mut sink, why).await,
            },
            r = rx.recv() => {
                let m = match r {
                    Ok(text) => Message::Text(text),
                    Err(RecvError::Lagged(n)) => Message::Text(Utf8Bytes::from(wire::skipped_json(n))),
                    Err(RecvError::Closed) => break,
                };
                if let Err(why) = alive.send(&mut sink, m).await {
                    return give_up(&mut sink, why).await;
                }
            }
            () = &mut engine_done => break,
            () = cancel.cancelled() => break,
        }
    }
    // The echo is a display aid: on shutdown it just says goodbye (no draining is promised).
    let _ = sink
        .send(Message::Close(Some(CloseFrame {
            code: close_code::AWAY,
            reason: Utf8Bytes::from_static("service shutting down"),
        })))
        .await;
    CloseReason::Shutdown
}

#[cfg(test)]
mod tests {
    use super::*;

    fn polar_at(x: f64, y: f64) -> SensorKind {
        SensorKind::Polar {
            x,
            y,
            sigma_range: 10.0,
            sigma_bearing_deg: 0.5,
            sigma_range_rate: None,
        }
    }

    fn polar(range: f64, bearing_deg: f64) -> Measurement {
        Measurement::Polar {
            range,
            bearing_deg,
            range_rate: None,
        }
    }

    #[test]
    fn polar_detections_land_where_the_bearing_convention_puts_them() {
        // Exact values: sin 30° = 1/2, cos 30° = √3/2 (standard trigonometric table); bearings
        // clockwise from north (wire contract), so 90° is due east and 180° due south.
        let k = polar_at(100.0, -50.0);
        let check = |m: Measurement, (ex, ey): (f64, f64)| {
            let (x, y) = site_position(&m, &k);
            assert!(
                (x - ex).abs() < 1e-9 && (y - ey).abs() < 1e-9,
                "{m:?}: ({x}, {y}) != ({ex}, {ey})"
            );
        };
        check(polar(1000.0, 30.0), (600.0, -50.0 + 500.0 * 3f64.sqrt()));
        check(polar(200.0, 90.0), (300.0, -50.0));
        check(polar(200.0, 180.0), (100.0, -250.0));
        check(polar(200.0, 270.0), (-100.0, -50.0));
        check(Measurement::Cartesian { x: 3.5, y: -7.0 }, (3.5, -7.0));
    }

    #[test]
    fn echo_message_is_json_with_site_frame_detections() {
        let site = crate::config::Site::demo(|_| None).unwrap();
        let scan = Scan {
            sensor: 0,
            time: 1_764_600_000.5,
            tag: 42,
            detections: vec![polar(1000.0, 90.0), polar(500.0, 0.0)],
        };
        let mut out = String::new();
        write_echo(&mut out, &scan, &site.sensors);
        let v: serde_json::Value = serde_json::from_str(&out).unwrap();
        assert_eq!(v["sensor"], "kestrel-radar");
        assert_eq!(v["seq"], 42);
        assert_eq!(v["time"], 1_764_600_000.5);
        let d = v["detections"].as_array().unwrap();
        assert_eq!(d.len(), 2);
        // The demo radar stands at the site origin.
        assert!((d[0]["x"].as_f64().unwrap() - 1000.0).abs() < 1e-9);
        assert!(d[0]["y"].as_f64().unwrap().abs() < 1e-9);
        assert!(d[1]["x"].as_f64().unwrap().abs() < 1e-9);
        assert!((d[1]["y"].as_f64().unwrap() - 500.0).abs() < 1e-9);
    }
}
