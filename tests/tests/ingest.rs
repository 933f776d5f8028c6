//! Batches in, frames out, over real sockets against the real binary; every kind of bad
//! input gets its error and the server stays up; authorisation.

use plotweave_tests::*;
use serde_json::json;

fn start(limits: &str) -> (Server, std::path::PathBuf) {
    let dir = temp_dir("ingest");
    let cfg = write_file(&dir, "site.toml", &site_toml(limits));
    let server = Server::start(
        &plotweave_bin!(),
        &["serve", "--config", cfg.to_str().unwrap()],
    )
    .expect("server starts");
    (server, dir)
}

/// A target moving at constant velocity (12, 5) m/s from (100, 500), seen by the camera once
/// per second without noise: the tracker's estimate must converge on the truth. The truth is
/// the reference here (it is generated, not computed by the service).
#[tokio::test]
async fn batches_in_frames_out_and_the_track_follows_the_target() {
    let (server, _dir) = start("");
    let mut frames = ws_connect(&server.ws_url("/v1/frames"), Some(READ_TOKEN))
        .await
        .unwrap();
    let mut ingest = ws_connect(&server.ws_url("/v1/ingest"), Some(CAMERA_TOKEN))
        .await
        .unwrap();
    let t0 = 1_764_600_000.0;
    let n = 12u64;
    for k in 0..n {
        let t = k as f64;
        let reply = send_batch(
            &mut ingest,
            &camera_batch(k + 1, t0 + t, &[(100.0 + 12.0 * t, 500.0 + 5.0 * t)]),
        )
        .await
        .unwrap();
        assert_eq!(reply, json!({"ack": k + 1}), "{}", server.stderr());
    }
    let mut last = serde_json::Value::Null;
    for k in 0..n {
        let f = next_json(&mut frames).await.unwrap();
        assert_eq!(f["seq"], k + 1);
        assert_eq!(f["sensor"], "quay-camera");
        assert_eq!(f["time"], t0 + k as f64);
        assert!(f["ended"].is_array());
        last = f;
    }
    let tracks = last["tracks"].as_array().unwrap();
    assert_eq!(tracks.len(), 1, "{last}");
    let tr = &tracks[0];
    let t = (n - 1) as f64;
    let (x, y) = (100.0 + 12.0 * t, 500.0 + 5.0 * t);
    assert!((tr["x"].as_f64().unwrap() - x).abs() < 3.0, "{tr}");
    assert!((tr["y"].as_f64().unwrap() - y).abs() < 3.0, "{tr}");
    assert!((tr["vx"].as_f64().unwrap() - 12.0).abs() < 1.5, "{tr}");
    assert!((tr["vy"].as_f64().unwrap() - 5.0).abs() < 1.5, "{tr}");
    assert_eq!(tr["status"], "confirmed");
    assert_eq!(tr["sensors"], json!(["quay-camera"]));
    assert_eq!(tr["cov"].as_array().unwrap().len(), 10);
    assert_eq!(tr["last_update"], t0 + t);

    // The same picture over HTTP, and one track with its history.
    let r = http(&server.addr, "GET", "/v1/tracks", Some(READ_TOKEN), None)
        .await
        .unwrap();
    assert_eq!(r.status, 200);
    assert_eq!(r.json().unwrap(), last);
    let id = tr["id"].as_u64().unwrap();
    let r = http(
        &server.addr,
        "GET",
        &format!("/v1/tracks/{id}"),
        Some(READ_TOKEN),
        None,
    )
    .await
    .unwrap();
    let v = r.json().unwrap();
    assert_eq!(v["track"]["id"], id);
    let hist = v["history"].as_array().unwrap();
    assert!(hist.len() >= 2 && hist.len() <= n as usize, "{v}");
    assert_eq!(hist.last().unwrap()["time"], t0 + t);
    let r = http(
        &server.addr,
        "GET",
        "/v1/tracks/999999",
        Some(READ_TOKEN),
        None,
    )
    .await
    .unwrap();
    assert_eq!(
        (r.status, r.json().unwrap()["error"]["code"].clone()),
        (404, json!("not_found"))
    );

    // Filters: a bounding box away from the target and status=tentative both hide it.
    let r = http(
        &server.addr,
        "GET",
        "/v1/tracks?bbox=-1000,0,0,100",
        Some(READ_TOKEN),
        None,
    )
    .await
    .unwrap();
    assert_eq!(r.json().unwrap()["tracks"], json!([]));
    let r = http(
        &server.addr,
        "GET",
        "/v1/tracks?status=tentative",
        Some(READ_TOKEN),
        None,
    )
    .await
    .unwrap();
    assert_eq!(r.json().unwrap()["tracks"], json!([]));
    let r = http(
        &server.addr,
        "GET",
        "/v1/tracks?sensor=quay-camera&status=confirmed",
        Some(READ_TOKEN),
        None,
    )
    .await
    .unwrap();
    assert_eq!(r.json().unwrap()["tracks"].as_array().unwrap().len(), 1);
    let r = http(
        &server.addr,
        "GET",
        "/v1/tracks?bbox=1,2,3",
        Some(READ_TOKEN),
        None,
    )
    .await
    .unwrap();
    assert_eq!(r.status, 400);
    assert!(r.body.contains("bbox"), "{}", r.body);

    // Sensors: configuration and live health.
    let r = http(&server.addr, "GET", "/v1/sensors", Some(READ_TOKEN), None)
        .await
        .unwrap();
    let v = r.json().unwrap();
    assert_eq!(v["sensors"][1]["id"], "quay-camera");
    assert_eq!(v["sensors"][1]["last_seq"], n);
    assert_eq!(v["sensors"][1]["health"]["scans"], n);
    assert!(!r.body.contains(CAMERA_TOKEN));
}

/// check(batch text, expected code): each bad batch gets its own error reply and the
/// connection stays usable.
#[tokio::test]
async fn every_kind_of_bad_batch_gets_its_error_and_the_server_stays_up() {
    let (server, _dir) = start("max_detections = 3\nmax_message_bytes = 2048");
    let mut ws = ws_connect(&server.ws_url("/v1/ingest"), Some(CAMERA_TOKEN))
        .await
        .unwrap();
    let t0 = 1_764_600_000.0;
    assert_eq!(
        send_batch(&mut ws, &camera_batch(10, t0 + 10.0, &[]))
            .await
            .unwrap(),
        json!({"ack": 10})
    );
    let cases: Vec<(String, &str, &str)> = vec![
        ("{\"sensor\": ".into(), "malformed_json", "not valid JSON"),
        (
            r#"{"sensor":"quay-camera","seq":11,"time":11}"#.into(),
            "schema",
            "missing field `detections`",
        ),
        (
            format!(
                r#"{{"sensor":"quay-camera","seq":11,"time":{},"detections":[{{"x":1e999,"y":0}}]}}"#,
                t0 + 11.0
            ),
            "non_finite",
            "detections[0].x",
        ),
        (
            format!(
                r#"{{"sensor":"quay-camera","seq":11,"time":{},"detections":[{{"range":5,"bearing":1}}]}}"#,
                t0 + 11.0
            ),
            "schema",
            "detections[0].range: this sensor is cartesian",
        ),
        (
            format!(
                r#"{{"sensor":"lighthouse","seq":11,"time":{},"detections":[]}}"#,
                t0 + 11.0
            ),
            "unknown_sensor",
            "\"lighthouse\" is not configured",
        ),
        (
            camera_batch(
                11,
                t0 + 11.0,
                &[(1.0, 1.0), (2.0, 2.0), (3.0, 3.0), (4.0, 4.0)],
            )
            .to_string(),
            "too_many_detections",
            "4 detections exceed server.limits.max_detections = 3",
        ),
        (
            camera_batch(10, t0 + 12.0, &[]).to_string(),
            "duplicate_seq",
            "last accepted seq 10",
        ),
        (
            camera_batch(11, t0 + 5.0, &[]).to_string(),
            "late_scan",
            "older than the newest accepted scan",
        ),
        (
            radar_batch(11, t0 + 11.0, &[]).to_string(),
            "forbidden",
            "belongs to sensor \"quay-camera\"",
        ),
    ];
    for (text, code, fragment) in &cases {
        send_text(&mut ws, text.clone()).await.unwrap();
        let reply = next_json(&mut ws).await.unwrap();
        assert_eq!(error_code(&reply), Some(*code), "{text} -> {reply}");
        let msg = reply["error"]["message"].as_str().unwrap();
        assert!(msg.contains(fragment), "{msg:?} lacks {fragment:?}");
    }
    // The batch is named by its seq where it could be read.
    send_text(&mut ws, camera_batch(10, t0 + 12.0, &[]).to_string())
        .await
        .unwrap();
    assert_eq!(next_json(&mut ws).await.unwrap()["error"]["seq"], 10);

    // Binary messages are refused with an error reply; the connection stays open.
    use futures_util::SinkExt;
    ws.send(tokio_tungstenite::tungstenite::Message::binary(vec![
        1u8, 2, 3,
    ]))
    .await
    .unwrap();
    let reply = next_json(&mut ws).await.unwrap();
    assert_eq!(error_code(&reply), Some("binary_frame"), "{reply}");
    assert_eq!(
        send_batch(&mut ws, &camera_batch(11, t0 + 11.0, &[]))
            .await
            .unwrap(),
        json!({"ack": 11})
    );

    // Oversized: an error reply, then close 1009; a new connection works.
    let big = format!(
        r#"{{"sensor":"quay-camera","seq":12,"time":{},"detections":[],"pad":"{}"}}"#,
        t0 + 12.0,
        "x".repeat(4096)
    );
    send_text(&mut ws, big).await.unwrap();
    let reply = next_json(&mut ws).await.unwrap();
    assert_eq!(error_code(&reply), Some("too_large"), "{reply}");
    assert!(
        reply["error"]["message"]
            .as_str()
            .unwrap()
            .contains("max_message_bytes = 2048")
    );
    assert_eq!(next(&mut ws).await.unwrap(), Incoming::Close(Some(1009)));
    let mut ws = ws_connect(&server.ws_url("/v1/ingest"), Some(CAMERA_TOKEN))
        .await
        .unwrap();
    assert_eq!(
        send_batch(&mut ws, &camera_batch(12, t0 + 12.0, &[]))
            .await
            .unwrap(),
        json!({"ack": 12})
    );
    let r = http(&server.addr, "GET", "/healthz", None, None)
        .await
        .unwrap();
    assert_eq!(r.status, 200);
}

#[tokio::test]
async fn authorisation_of_ingest_frames_and_reads() {
    let (server, _dir) = start("");
    let ingest = server.ws_url("/v1/ingest");
    // Every sensor has a token, so an anonymous ingest connection is refused at the upgrade.
    let e = ws_connect(&ingest, None).await.unwrap_err().to_string();
    assert!(
        e.starts_with("HTTP 401") && e.contains("\"unauthorized\""),
        "{e}"
    );
    let e = ws_connect(&ingest, Some("not-a-token-of-anyone"))
        .await
        .unwrap_err()
        .to_string();
    assert!(
        e.starts_with("HTTP 401") && e.contains("not the token of any configured sensor"),
        "{e}"
    );
    // The read token is valid but not an ingest token: 403 (docs/wire.md, error codes).
    let e = ws_connect(&ingest, Some(READ_TOKEN))
        .await
        .unwrap_err()
        .to_string();
    assert!(e.starts_with("HTTP 403"), "{e}");
    // The radar's token sends for the radar only.
    let mut ws = ws_connect(&ingest, Some(RADAR_TOKEN)).await.unwrap();
    let reply = send_batch(&mut ws, &radar_batch(1, 1_764_600_000.0, &[(800.0, 45.0)]))
        .await
        .unwrap();
    assert_eq!(reply, json!({"ack": 1}));
    let reply = send_batch(&mut ws, &camera_batch(1, 1_764_600_001.0, &[]))
        .await
        .unwrap();
    assert_eq!(error_code(&reply), Some("forbidden"), "{reply}");

    let frames = server.ws_url("/v1/frames");
    let e = ws_connect(&frames, None).await.unwrap_err().to_string();
    assert!(e.starts_with("HTTP 401"), "{e}");
    let e = ws_connect(&frames, Some(CAMERA_TOKEN))
        .await
        .unwrap_err()
        .to_string();
    assert!(e.starts_with("HTTP 403"), "{e}");
    assert!(ws_connect(&frames, Some(READ_TOKEN)).await.is_ok());
    assert!(ws_connect(&frames, Some(ADMIN_TOKEN)).await.is_ok());
    let e = ws_connect(&format!("{frames}?status=lost"), Some(READ_TOKEN))
        .await
        .unwrap_err()
        .to_string();
    assert!(e.starts_with("HTTP 400") && e.contains("status"), "{e}");

    for path in ["/v1/tracks", "/v1/sensors", "/v1/tracks/1"] {
        let r = http(&server.addr, "GET", path, None, None).await.unwrap();
        assert_eq!(r.status, 401, "{path}");
        assert_eq!(r.json().unwrap()["error"]["code"], "unauthorized");
    }
    // Metrics and probes are open.
    assert_eq!(
        http(&server.addr, "GET", "/metrics", None, None)
            .await
            .unwrap()
            .status,
        200
    );
    assert_eq!(
        http(&server.addr, "GET", "/readyz", None, None)
            .await
            .unwrap()
            .status,
        200
    );
    // Tokens never reach the log.
    let log = server.stderr();
    for t in [
        RADAR_TOKEN,
        CAMERA_TOKEN,
        READ_TOKEN,
        ADMIN_TOKEN,
        "not-a-token-of-anyone",
    ] {
        assert!(!log.contains(t), "token in log:\n{log}");
    }
}

#[tokio::test]
async fn a_sensor_sending_too_fast_is_rate_limited() {
    let (server, _dir) = start("max_batches_per_second = 2.0");
    let mut ws = ws_connect(&server.ws_url("/v1/ingest"), Some(CAMERA_TOKEN))
        .await
        .unwrap();
    let start = std::time::Instant::now();
    let mut acked = 0;
    let mut limited = 0;
    for k in 1..=20u64 {
        let reply = send_batch(&mut ws, &camera_batch(k, 1_764_600_000.0 + k as f64, &[]))
            .await
            .unwrap();
        match error_code(&reply) {
            None => acked += 1,
            Some("rate_limited") => limited += 1,
            other => panic!("unexpected {other:?}: {reply}"),
        }
    }
    // A bucket of 2 refilled at 2/s admits at most 2 + 2·elapsed of the 20 batches.
    let bound = 2.0 + 2.0 * start.elapsed().as_secs_f64();
    assert!(
        f64::from(acked) <= bound.floor(),
        "acked {acked}, bound {bound}"
    );
    assert!(limited >= 1);
    let s = scrape(&server.addr).await.unwrap();
    assert_eq!(
        sample(
            &s,
            "plotweave_batches_rejected_total",
            &[("sensor", "quay-camera"), ("reason", "rate_limited")]
        ),
        Some(f64::from(limited))
    );
}
