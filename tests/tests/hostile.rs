//! Hostile input end to end: a corpus of bad messages against a running server. Each gets its
//! error reply or a clean close, the server stays up and keeps serving another sensor, and its
//! memory stays bounded even when 100 MB messages arrive.

use futures_util::SinkExt;
use plotweave_tests::*;
use serde_json::json;
use tokio_tungstenite::tungstenite::Message;

fn peak_rss_mib(pid: u32) -> f64 {
    let s = std::fs::read_to_string(format!("/proc/{pid}/status")).expect("proc status");
    let kb: f64 = s
        .lines()
        .find(|l| l.starts_with("VmHWM:"))
        .and_then(|l| l.split_whitespace().nth(1))
        .and_then(|v| v.parse().ok())
        .expect("VmHWM");
    kb / 1024.0
}

/// Send `msg` on a fresh camera connection; return the first thing the server answers.
async fn answer(server: &Server, msg: Message) -> Incoming {
    let mut ws = ws_connect(&server.ws_url("/v1/ingest"), Some(CAMERA_TOKEN))
        .await
        .expect("connect");
    // A server that closes while a huge message is still being written may reset the
    // connection: the write error is then expected, and what was answered is still read.
    let _ = ws.send(msg).await;
    next(&mut ws).await.unwrap_or(Incoming::End)
}

fn code(i: &Incoming) -> Option<&str> {
    match i {
        Incoming::Json(v) => error_code(v),
        _ => None,
    }
}

#[tokio::test]
async fn a_corpus_of_hostile_messages_leaves_the_server_up_and_bounded() {
    let dir = temp_dir("hostile");
    // Default limits (1 MiB messages, 10 000 detections per batch).
    let cfg = write_file(&dir, "site.toml", &site_toml(""));
    let server = Server::start(
        &plotweave_bin!(),
        &["serve", "--config", cfg.to_str().unwrap()],
    )
    .expect("server starts");
    let pid = server.pid().expect("pid");
    let base_rss = peak_rss_mib(pid);
    let t0 = 1_764_600_000.0;

    let nested = format!("{}{}", "[".repeat(100_000), "]".repeat(100_000));
    let cases: Vec<(&str, String, &[&str])> = vec![
        (
            "truncated",
            r#"{"sensor":"quay-camera","seq":1,"time":"#.into(),
            &["malformed_json"],
        ),
        (
            "deeply nested",
            nested,
            &["malformed_json", "schema", "too_large"],
        ),
        (
            "NaN spelled out",
            format!(
                r#"{{"sensor":"quay-camera","seq":1,"time":{t0},"detections":[{{"x":NaN,"y":0}}]}}"#
            ),
            &["malformed_json"],
        ),
        (
            "huge number",
            format!(
                r#"{{"sensor":"quay-camera","seq":1,"time":{t0},"detections":[{{"x":1e400,"y":0}}]}}"#
            ),
            &["non_finite", "malformed_json"],
        ),
        (
            "wrong types",
            r#"{"sensor":7,"seq":"one","time":[],"detections":{}}"#.into(),
            &["schema"],
        ),
        (
            "negative seq",
            format!(r#"{{"sensor":"quay-camera","seq":-4,"time":{t0},"detections":[]}}"#),
            &["schema"],
        ),
        (
            "time before the epoch",
            r#"{"sensor":"quay-camera","seq":1,"time":-1e9,"detections":[]}"#.into(),
            &["out_of_range"],
        ),
        ("not an object", "[1,2,3]".into(), &["schema"]),
        (
            "time a century ahead",
            r#"{"sensor":"quay-camera","seq":1,"time":4900000000,"detections":[]}"#.into(),
            &["out_of_range"],
        ),
    ];
    for (name, text, codes) in &cases {
        let a = answer(&server, Message::text(text.clone())).await;
        let c = code(&a);
        assert!(
            c.is_some_and(|c| codes.contains(&c)),
            "{name}: expected one of {codes:?}, got {a:?}"
        );
    }
    // Invalid UTF-8 can only travel in a binary frame: refused with binary_frame.
    let a = answer(&server, Message::binary(vec![0xff, 0xfe, 0xfd, 0x00])).await;
    assert_eq!(code(&a), Some("binary_frame"), "{a:?}");
    // 10 MB, 100 MB, and a million detections (about 30 MB): too large, then closed (1009).
    let million: String = {
        let mut s = format!(r#"{{"sensor":"quay-camera","seq":1,"time":{t0},"detections":["#);
        for i in 0..1_000_000 {
            if i > 0 {
                s.push(',');
            }
            s.push_str(r#"{"x":1.5,"y":2.5}"#);
        }
        s.push_str("]}");
        s
    };
    for (name, text) in [
        ("10 MB", "x".repeat(10 << 20)),
        ("100 MB", "y".repeat(100 << 20)),
        ("a million detections", million),
    ] {
        let a = answer(&server, Message::text(text)).await;
        let ok = matches!(a, Incoming::Close(Some(1009)) | Incoming::End)
            || code(&a) == Some("too_large");
        assert!(ok, "{name}: expected too_large or a close, got {a:?}");
    }

    // Still up: the radar sends and is acknowledged, health answers.
    let mut radar = ws_connect(&server.ws_url("/v1/ingest"), Some(RADAR_TOKEN))
        .await
        .unwrap();
    assert_eq!(
        send_batch(&mut radar, &radar_batch(1, t0, &[(900.0, 45.0)]))
            .await
            .unwrap(),
        json!({"ack": 1})
    );
    assert_eq!(
        http(&server.addr, "GET", "/healthz", None, None)
            .await
            .unwrap()
            .status,
        200
    );
    // Bounded: the 100 MB message was never held (1 MiB limit); allow generous headroom over
    // the starting peak for buffers and allocator slack.
    let peak = peak_rss_mib(pid);
    assert!(
        peak < base_rss + 64.0,
        "peak resident memory grew from {base_rss:.1} MiB to {peak:.1} MiB"
    );
    eprintln!("peak resident memory: {base_rss:.1} MiB at start, {peak:.1} MiB after the corpus");
}
