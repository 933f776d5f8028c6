//! Connection liveness end to end against the real binary: the server Pings every WebSocket
//! connection every `server.limits.ping_interval` and closes one from which nothing arrived
//! for `server.limits.idle_timeout` (service/src/keepalive.rs), counting it in
//! `plotweave_connections_closed_total{reason="idle_timeout"}`; clients that read (and so
//! answer Pings, as RFC 6455 requires and tokio-tungstenite does by itself) stay connected;
//! a sensor that reconnects continues its sequence, and a skipped `seq` is counted as a gap.

use std::time::{Duration, Instant};

use futures_util::StreamExt;
use plotweave_tests::*;
use serde_json::json;
use tokio::io::{AsyncReadExt, AsyncWriteExt};
use tokio::net::TcpStream;
use tokio_tungstenite::tungstenite::Message;

/// Small values so the test is quick: Ping every 0.2 s, close after 0.6 s of silence.
const PING: f64 = 0.2;
const IDLE: f64 = 0.6;

fn start() -> Server {
    let dir = temp_dir("connections");
    let limits = format!("ping_interval = {PING}\nidle_timeout = {IDLE}");
    let cfg = write_file(&dir, "site.toml", &site_toml(&limits));
    Server::start(
        &plotweave_bin!(),
        &["serve", "--config", cfg.to_str().unwrap()],
    )
    .expect("server starts")
}

/// A half-open peer: complete the WebSocket handshake over a raw TCP stream (reading exactly
/// the 101 response, nothing after it), then never read or send again. Returns the stream and
/// when the handshake completed.
async fn half_open(addr: &str, path: &str, token: &str) -> (TcpStream, Instant) {
    let mut s = TcpStream::connect(addr).await.unwrap();
    let req = format!(
        "GET {path} HTTP/1.1\r\nHost: {addr}\r\nUpgrade: websocket\r\nConnection: Upgrade\r\n\
         Sec-WebSocket-Key: dGhlIHNhbXBsZSBub25jZQ==\r\nSec-WebSocket-Version: 13\r\n\
         Authorization: Bearer {token}\r\n\r\n"
    );
    s.write_all(req.as_bytes()).await.unwrap();
    let mut head = Vec::new();
    let mut byte = [0u8; 1];
    while !head.ends_with(b"\r\n\r\n") {
        tokio::time::timeout(WAIT, s.read_exact(&mut byte))
            .await
            .expect("handshake answered")
            .unwrap();
        head.push(byte[0]);
    }
    let head = String::from_utf8_lossy(&head).into_owned();
    assert!(head.starts_with("HTTP/1.1 101"), "{path}: {head}");
    (s, Instant::now())
}

/// The server's (unmasked) frames in `bytes`: (opcode, payload).
fn frames(mut bytes: &[u8]) -> Vec<(u8, Vec<u8>)> {
    let mut out = Vec::new();
    while bytes.len() >= 2 {
        let op = bytes[0] & 0x0f;
        let len = usize::from(bytes[1] & 0x7f);
        assert!(len < 126 && bytes[1] & 0x80 == 0, "unexpected frame header");
        out.push((op, bytes[2..2 + len].to_vec()));
        bytes = &bytes[2 + len..];
    }
    assert!(bytes.is_empty(), "a partial frame at the end");
    out
}

fn closed(s: &prometheus_parse::Scrape, endpoint: &str, reason: &str) -> f64 {
    sample(
        s,
        "plotweave_connections_closed_total",
        &[("endpoint", endpoint), ("reason", reason)],
    )
    .unwrap_or_else(|| panic!("no plotweave_connections_closed_total{{{endpoint},{reason}}}"))
}

fn open(s: &prometheus_parse::Scrape, endpoint: &str) -> f64 {
    sample(s, "plotweave_connections", &[("endpoint", endpoint)]).unwrap()
}

/// Read `ws` until `until`, counting Pings (reading is what answers them); any close or
/// error fails.
async fn listen(mut ws: Ws, until: tokio::time::Instant) -> (Ws, usize) {
    let mut pings = 0;
    loop {
        match tokio::time::timeout_at(until, ws.next()).await {
            Err(_) => return (ws, pings),
            Ok(Some(Ok(Message::Ping(_)))) => pings += 1,
            Ok(Some(Ok(Message::Pong(_)))) => {}
            Ok(other) => panic!("a live client got {other:?}"),
        }
    }
}

#[tokio::test]
async fn a_half_open_peer_is_closed_within_idle_timeout_and_a_live_client_stays() {
    let server = start();
    // Live clients on every endpoint, reading (so answering Pings) in tasks of their own.
    let ingest = ws_connect(&server.ws_url("/v1/ingest"), Some(CAMERA_TOKEN))
        .await
        .unwrap();
    let frames_ws = ws_connect(&server.ws_url("/v1/frames"), Some(READ_TOKEN))
        .await
        .unwrap();
    let echo = ws_connect(&server.ws_url("/v1/detections"), Some(READ_TOKEN))
        .await
        .unwrap();
    // Three times the idle timeout: the live clients must survive several intervals.
    let until = tokio::time::Instant::now() + Duration::from_secs_f64(3.0 * IDLE);
    let live: Vec<_> = [ingest, frames_ws, echo]
        .into_iter()
        .map(|ws| tokio::spawn(listen(ws, until)))
        .collect();

    // Half-open peers on the same server.
    let mut dead = Vec::new();
    for (endpoint, path, token) in [
        ("ingest", "/v1/ingest", RADAR_TOKEN),
        ("frames", "/v1/frames", READ_TOKEN),
        ("detections", "/v1/detections", READ_TOKEN),
    ] {
        let (s, t0) = half_open(&server.addr, path, token).await;
        dead.push((endpoint, s, t0, None::<f64>));
    }
    // Watch the counter until each half-open peer is closed as idle.
    let give_up = Instant::now() + WAIT;
    while dead.iter().any(|d| d.3.is_none()) {
        assert!(
            Instant::now() < give_up,
            "not closed: {:?}",
            server.stderr()
        );
        let s = scrape(&server.addr).await.unwrap();
        for d in dead.iter_mut().filter(|d| d.3.is_none()) {
            if closed(&s, d.0, "idle_timeout") >= 1.0 {
                d.3 = Some(d.2.elapsed().as_secs_f64());
            }
        }
        tokio::time::sleep(Duration::from_millis(50)).await;
    }
    for (endpoint, mut s, _, after) in dead {
        // Not before the idle timeout; within it plus generous slack for a loaded machine.
        let after = after.unwrap();
        assert!(
            (IDLE - 0.1..IDLE + 2.0).contains(&after),
            "{endpoint}: closed after {after} s"
        );
        // What the peer would have read: Pings, then a close frame 1001, then end of stream.
        let mut rest = Vec::new();
        tokio::time::timeout(WAIT, s.read_to_end(&mut rest))
            .await
            .expect("the server closed the TCP connection")
            .unwrap();
        let got = frames(&rest);
        let (last, pings) = got.split_last().expect("frames");
        assert!(!pings.is_empty(), "{endpoint}: no Ping before the close");
        assert!(
            pings.iter().all(|(op, _)| *op == 0x9),
            "{endpoint}: {got:?}"
        );
        assert_eq!(
            last.0, 0x8,
            "{endpoint}: last frame is not a close: {got:?}"
        );
        assert_eq!(u16::from_be_bytes([last.1[0], last.1[1]]), 1001);
        assert!(String::from_utf8_lossy(&last.1[2..]).contains("server.limits.idle_timeout"));
    }

    // The live clients were pinged all along and are still connected.
    let mut live_ws = Vec::new();
    for task in live {
        let (ws, pings) = task.await.unwrap();
        assert!(pings >= 3, "only {pings} pings in {} s", 3.0 * IDLE);
        live_ws.push(ws);
    }
    let s = scrape(&server.addr).await.unwrap();
    for endpoint in ["ingest", "frames", "detections"] {
        assert_eq!(open(&s, endpoint), 1.0, "{endpoint}");
        assert_eq!(closed(&s, endpoint, "idle_timeout"), 1.0, "{endpoint}");
        for reason in ["peer", "send_timeout", "too_large", "shutdown"] {
            assert_eq!(closed(&s, endpoint, reason), 0.0, "{endpoint} {reason}");
        }
    }
    // And they work: a batch is acknowledged, its frame and its echo arrive.
    let [mut ingest, mut frames_ws, mut echo] = <[Ws; 3]>::try_from(live_ws).ok().unwrap();
    let batch = camera_batch(1, 1_764_600_000.0, &[(20.0, 800.0)]);
    assert_eq!(
        send_batch(&mut ingest, &batch).await.unwrap(),
        json!({"ack": 1})
    );
    assert_eq!(next_json(&mut frames_ws).await.unwrap()["seq"], 1);
    assert_eq!(next_json(&mut echo).await.unwrap()["seq"], 1);
}

#[tokio::test]
async fn a_sensor_that_reconnects_continues_its_sequence_and_a_skipped_seq_is_a_gap() {
    let server = start();
    let t0 = 1_764_600_000.0;
    let mut first = ws_connect(&server.ws_url("/v1/ingest"), Some(CAMERA_TOKEN))
        .await
        .unwrap();
    for seq in 1..=3u64 {
        let reply = send_batch(&mut first, &camera_batch(seq, t0 + seq as f64, &[]))
            .await
            .unwrap();
        assert_eq!(reply, json!({"ack": seq}));
    }
    // The sensor's link dies: the connection stays open but nothing is read or answered any
    // more (this client answers Pings only while it reads). The server closes it as idle.
    let give_up = Instant::now() + WAIT;
    loop {
        let s = scrape(&server.addr).await.unwrap();
        if closed(&s, "ingest", "idle_timeout") == 1.0 {
            assert_eq!(open(&s, "ingest"), 0.0);
            break;
        }
        assert!(
            Instant::now() < give_up,
            "the silent connection was not closed"
        );
        tokio::time::sleep(Duration::from_millis(50)).await;
    }
    drop(first);

    // The sensor reconnects and goes on with its next seq; a repeat is refused; seq 5 is
    // never sent, so 6 leaves a gap of one.
    let mut second = ws_connect(&server.ws_url("/v1/ingest"), Some(CAMERA_TOKEN))
        .await
        .unwrap();
    let reply = send_batch(&mut second, &camera_batch(4, t0 + 4.0, &[]))
        .await
        .unwrap();
    assert_eq!(reply, json!({"ack": 4}));
    let reply = send_batch(&mut second, &camera_batch(3, t0 + 4.5, &[]))
        .await
        .unwrap();
    assert_eq!(error_code(&reply), Some("duplicate_seq"), "{reply}");
    let reply = send_batch(&mut second, &camera_batch(6, t0 + 6.0, &[]))
        .await
        .unwrap();
    assert_eq!(reply, json!({"ack": 6}));
    second.close(None).await.unwrap();

    let give_up = Instant::now() + WAIT;
    let s = loop {
        // The session ends (and is counted) just after the close handshake.
        let s = scrape(&server.addr).await.unwrap();
        if closed(&s, "ingest", "peer") == 1.0 {
            break s;
        }
        assert!(
            Instant::now() < give_up,
            "the closed connection was not counted"
        );
        tokio::time::sleep(Duration::from_millis(20)).await;
    };
    let camera = [("sensor", "quay-camera")];
    assert_eq!(sample(&s, "plotweave_seq_gaps_total", &camera), Some(1.0));
    assert_eq!(
        sample(&s, "plotweave_batches_acked_total", &camera),
        Some(5.0)
    );
    assert_eq!(
        sample(&s, "plotweave_duplicate_batches_total", &camera),
        Some(1.0)
    );
    assert_eq!(closed(&s, "ingest", "idle_timeout"), 1.0);
    let r = http(&server.addr, "GET", "/v1/sensors", Some(READ_TOKEN), None)
        .await
        .unwrap();
    assert_eq!(r.json().unwrap()["sensors"][1]["last_seq"], 6);
}
