//! `/metrics` parsed with the `prometheus-parse` exposition parser; values checked against
//! what the test sent; a runtime parameter change shows in the metrics.

use plotweave_tests::*;
use serde_json::json;

#[tokio::test]
async fn metrics_count_what_was_sent() {
    let dir = temp_dir("metrics");
    let cfg = write_file(&dir, "site.toml", &site_toml(""));
    let server = Server::start(
        &plotweave_bin!(),
        &["serve", "--config", cfg.to_str().unwrap()],
    )
    .unwrap();
    let mut frames = ws_connect(&server.ws_url("/v1/frames"), Some(READ_TOKEN))
        .await
        .unwrap();
    let mut ws = ws_connect(&server.ws_url("/v1/ingest"), Some(RADAR_TOKEN))
        .await
        .unwrap();
    let t0 = 1_764_600_000.0;
    // seq 1, 2, 3 with 2 + 3 + 0 detections, then 6 (gap of 2), a repeat of 6, bad JSON.
    let plan: [(u64, usize); 4] = [(1, 2), (2, 3), (3, 0), (6, 1)];
    let mut sent_detections = 0;
    for (seq, n) in plan {
        let points: Vec<(f64, f64)> = (0..n)
            .map(|i| (1000.0 + 300.0 * i as f64, 20.0 + 40.0 * i as f64))
            .collect();
        sent_detections += n;
        let reply = send_batch(&mut ws, &radar_batch(seq, t0 + seq as f64, &points))
            .await
            .unwrap();
        assert_eq!(reply, json!({"ack": seq}));
        if seq == 1 {
            // On an empty picture each of the two detections (300 m and 40° apart) is explained
            // by no track, so each starts a candidate (docs/metrics.md), none reported yet.
            next_json(&mut frames).await.unwrap();
            let s = scrape(&server.addr).await.unwrap();
            assert_eq!(sample(&s, "plotweave_track_candidates", &[]), Some(2.0));
        }
    }
    let reply = send_batch(&mut ws, &radar_batch(6, t0 + 7.0, &[]))
        .await
        .unwrap();
    assert_eq!(error_code(&reply), Some("duplicate_seq"));
    send_text(&mut ws, "{oops").await.unwrap();
    assert_eq!(
        error_code(&next_json(&mut ws).await.unwrap()),
        Some("malformed_json")
    );
    for _ in 1..plan.len() {
        next_json(&mut frames).await.unwrap();
    }

    let s = scrape(&server.addr).await.unwrap();
    let radar = [("sensor", "sound-radar")];
    let get = |name: &str, labels: &[(&str, &str)]| {
        sample(&s, name, labels).unwrap_or_else(|| panic!("no sample {name} {labels:?}"))
    };
    assert_eq!(get("plotweave_batches_received_total", &radar), 5.0);
    assert_eq!(
        get(
            "plotweave_batches_received_total",
            &[("sensor", "_unknown")]
        ),
        1.0
    );
    assert_eq!(get("plotweave_batches_acked_total", &radar), 4.0);
    assert_eq!(
        get("plotweave_detections_total", &radar),
        sent_detections as f64
    );
    assert_eq!(get("plotweave_seq_gaps_total", &radar), 2.0);
    assert_eq!(get("plotweave_duplicate_batches_total", &radar), 1.0);
    assert_eq!(
        get(
            "plotweave_batches_rejected_total",
            &[("sensor", "sound-radar"), ("reason", "duplicate_seq")]
        ),
        1.0
    );
    assert_eq!(
        get(
            "plotweave_batches_rejected_total",
            &[("sensor", "_unknown"), ("reason", "malformed_json")]
        ),
        1.0
    );
    assert_eq!(get("plotweave_frames_total", &[]), 4.0);
    assert_eq!(get("plotweave_frame_subscribers", &[]), 1.0);
    assert_eq!(get("plotweave_connections", &[("endpoint", "ingest")]), 1.0);
    assert_eq!(
        get("plotweave_ingest_to_frame_latency_seconds_count", &[]),
        4.0
    );
    // Its parts, one observation per applied batch: the wait before the engine starts on a
    // batch and the tracker step both lie inside the ingest-to-frame span.
    assert_eq!(get("plotweave_engine_wait_seconds_count", &[]), 4.0);
    assert_eq!(get("plotweave_tracker_step_seconds_count", &[]), 4.0);
    let total = get("plotweave_ingest_to_frame_latency_seconds_sum", &[]);
    let parts = get("plotweave_engine_wait_seconds_sum", &[])
        + get("plotweave_tracker_step_seconds_sum", &[]);
    assert!(
        parts > 0.0 && parts <= total,
        "wait + step = {parts} s against ingest-to-frame {total} s"
    );
    assert_eq!(get("plotweave_sensor_clutter_rate_configured", &radar), 2.0);
    assert_eq!(
        get("plotweave_sensor_detection_probability_configured", &radar),
        0.9
    );
    // The camera sent nothing: its series exist at zero.
    assert_eq!(
        get(
            "plotweave_batches_received_total",
            &[("sensor", "quay-camera")]
        ),
        0.0
    );
    let live = get("plotweave_tracks", &[("status", "tentative")])
        + get("plotweave_tracks", &[("status", "confirmed")]);
    let picture = http(&server.addr, "GET", "/v1/tracks", Some(READ_TOKEN), None)
        .await
        .unwrap()
        .json()
        .unwrap();
    assert_eq!(live, picture["tracks"].as_array().unwrap().len() as f64);
    assert_eq!(
        get("plotweave_build", &[("version", env!("CARGO_PKG_VERSION"))]),
        1.0
    );
}

#[tokio::test]
async fn runtime_parameter_change_is_applied_and_visible_in_metrics() {
    let dir = temp_dir("admin");
    let cfg = write_file(&dir, "site.toml", &site_toml(""));
    let server = Server::start(
        &plotweave_bin!(),
        &["serve", "--config", cfg.to_str().unwrap()],
    )
    .unwrap();
    let path = "/v1/admin/sensors/sound-radar";
    let body = r#"{"clutter_rate": 7.5, "detection_probability": 0.75, "noise": {"range": 12.0}}"#;
    // Without the admin token: 401; with another token: 403.
    let r = http(&server.addr, "POST", path, None, Some(body))
        .await
        .unwrap();
    assert_eq!(r.status, 401);
    let r = http(&server.addr, "POST", path, Some(READ_TOKEN), Some(body))
        .await
        .unwrap();
    assert_eq!(r.status, 403);
    // Bad bodies are refused naming the field.
    for (bad, fragment) in [
        (
            r#"{"clutter_rate": -1}"#,
            "clutter_rate: must be finite and >= 0",
        ),
        (r#"{"noise": {"sigma": 3}}"#, "this sensor is polar"),
        (
            r#"{"detection_probabilty": 0.5}"#,
            "unknown field `detection_probabilty`",
        ),
        (r#"{}"#, "nothing to change"),
    ] {
        let r = http(&server.addr, "POST", path, Some(ADMIN_TOKEN), Some(bad))
            .await
            .unwrap();
        assert_eq!(r.status, 400, "{bad}");
        assert!(r.body.contains(fragment), "{bad}: {}", r.body);
    }
    let r = http(
        &server.addr,
        "POST",
        "/v1/admin/sensors/lighthouse",
        Some(ADMIN_TOKEN),
        Some(body),
    )
    .await
    .unwrap();
    assert_eq!(r.status, 404);

    let r = http(&server.addr, "POST", path, Some(ADMIN_TOKEN), Some(body))
        .await
        .unwrap();
    assert_eq!(r.status, 200, "{}", r.body);
    let v = r.json().unwrap();
    assert_eq!(
        (v["clutter_rate"].as_f64(), v["noise"]["range"].as_f64()),
        (Some(7.5), Some(12.0))
    );

    let s = scrape(&server.addr).await.unwrap();
    let radar = [("sensor", "sound-radar")];
    assert_eq!(
        sample(&s, "plotweave_sensor_clutter_rate_configured", &radar),
        Some(7.5)
    );
    assert_eq!(
        sample(
            &s,
            "plotweave_sensor_detection_probability_configured",
            &radar
        ),
        Some(0.75)
    );
    assert_eq!(
        sample(&s, "plotweave_sensor_param_changes_total", &radar),
        Some(1.0)
    );
    assert_eq!(
        sample(
            &s,
            "plotweave_sensor_clutter_rate_configured",
            &[("sensor", "quay-camera")]
        ),
        Some(0.1)
    );
    let sensors = http(&server.addr, "GET", "/v1/sensors", Some(READ_TOKEN), None)
        .await
        .unwrap()
        .json()
        .unwrap();
    assert_eq!(sensors["sensors"][0]["clutter_rate"], 7.5);
    assert_eq!(sensors["sensors"][0]["noise"]["range"], 12.0);
    assert!(
        server
            .stderr()
            .contains("sensor parameters changed by admin")
    );
}
