//! `plotweave replay`: a recording replayed into a live server gives the frames that `batch`
//! computes from the same recording; tokens, filters, rejections and an unreachable server.

use std::path::{Path, PathBuf};

use plotweave_tests::*;

fn examples() -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR")).join("../examples")
}

fn run_ok(bin: &Path, args: &[&str]) -> (Vec<u8>, String) {
    let (st, out, err) = run_to_end(bin, args).unwrap();
    assert!(st.success(), "{args:?}: {err}");
    (out, err)
}

/// Simulate the shipped crossing scenario into `dir`; the recording's path.
fn crossing_recording(bin: &Path, dir: &Path) -> PathBuf {
    let rec = dir.join("rec.jsonl");
    let truth = dir.join("truth.jsonl");
    let scenario = examples().join("kestrel-bay-crossing.scenario.toml");
    run_ok(
        bin,
        &[
            "simulate",
            "--scenario",
            scenario.to_str().unwrap(),
            "--output",
            rec.to_str().unwrap(),
            "--truth",
            truth.to_str().unwrap(),
        ],
    );
    rec
}

/// The part of a frame that is the tracker's result (time, sensor, seq, tracks, ended).
fn picture(f: &serde_json::Value) -> serde_json::Value {
    serde_json::json!({
        "time": f["time"], "sensor": f["sensor"], "seq": f["seq"],
        "tracks": f["tracks"], "ended": f["ended"],
    })
}

#[tokio::test]
async fn replay_into_a_live_server_yields_the_frames_of_batch() {
    let bin = plotweave_bin!();
    let dir = temp_dir("replay-same");
    let rec = crossing_recording(&bin, &dir);
    // The shipped site, with a frame buffer large enough that this test never skips a frame.
    let site = std::fs::read_to_string(examples().join("kestrel-bay-site.toml")).unwrap()
        + "frame_buffer = 100000\n";
    let cfg = write_file(&dir, "site.toml", &site);
    let (out, _) = run_ok(
        &bin,
        &[
            "batch",
            "--config",
            cfg.to_str().unwrap(),
            "--input",
            rec.to_str().unwrap(),
            "--output",
            "-",
        ],
    );
    let expected: Vec<serde_json::Value> = String::from_utf8(out)
        .unwrap()
        .lines()
        .map(|l| picture(&serde_json::from_str(l).unwrap()))
        .collect();
    assert_eq!(expected.len(), 420);

    let server = Server::start(&bin, &["serve", "--config", cfg.to_str().unwrap()]).unwrap();
    let mut frames = ws_connect(&server.ws_url("/v1/frames"), None)
        .await
        .unwrap();
    let url = server.ws_url("/v1/ingest");
    let (rec_s, url_s) = (rec.to_str().unwrap().to_string(), url.clone());
    let replay = tokio::task::spawn_blocking(move || {
        run_to_end(
            &plotweave_bin!(),
            &["replay", &rec_s, "--to", &url_s, "--speed", "max"],
        )
        .unwrap()
    });
    let mut got = Vec::new();
    while got.len() < expected.len() {
        got.push(picture(&next_json(&mut frames).await.unwrap()));
    }
    let (st, stdout, stderr) = replay.await.unwrap();
    assert!(st.success(), "{stderr}");
    let summary = String::from_utf8(stdout).unwrap();
    assert!(
        summary.contains("420 acknowledged, 0 rejected") && summary.contains("over 2 connections"),
        "{summary}"
    );
    for (i, (g, e)) in got.iter().zip(&expected).enumerate() {
        assert_eq!(g, e, "frame {i} differs");
    }
}

#[tokio::test]
async fn tokens_filters_rejections_and_an_unreachable_server() {
    let bin = plotweave_bin!();
    let dir = temp_dir("replay-misc");
    let cfg = write_file(
        &dir,
        "site.toml",
        &site_toml("max_batches_per_second = 100000.0"),
    );
    let t0 = 1_764_600_000.0;
    let mut text = String::new();
    for k in 1..=10u64 {
        text.push_str(&camera_batch(k, t0 + k as f64, &[(10.0, 900.0)]).to_string());
        text.push('\n');
        text.push_str(&radar_batch(k, t0 + k as f64 + 0.5, &[(900.0, 10.0)]).to_string());
        text.push('\n');
    }
    text.push_str("{broken\n");
    let rec = write_file(&dir, "rec.jsonl", &text);
    let server = Server::start(&bin, &["serve", "--config", cfg.to_str().unwrap()]).unwrap();
    let url = server.ws_url("/v1/ingest");
    let r = rec.to_str().unwrap();
    let camera_token = format!("quay-camera={CAMERA_TOKEN}");
    let radar_token = format!("sound-radar={RADAR_TOKEN}");

    // Without the radar's token the connection is refused, with a hint how to give it.
    let (st, _, err) =
        run_to_end(&bin, &["replay", r, "--to", &url, "--token", &camera_token]).unwrap();
    assert_eq!(st.code(), Some(1));
    assert!(
        err.contains("refused the connection for sensor \"sound-radar\": HTTP 401")
            && err.contains("--token sound-radar=TOKEN or set PLOTWEAVE_TOKEN_SOUND_RADAR"),
        "{err}"
    );

    // Only the camera, only the first 5 s: 4 batches (times t0+1 .. t0+4).
    let from = format!("{t0}");
    let until = format!("{}", t0 + 4.9);
    let (out, err) = run_ok(
        &bin,
        &[
            "replay",
            r,
            "--to",
            &url,
            "--token",
            &camera_token,
            "--sensor",
            "quay-camera",
            "--from",
            &from,
            "--until",
            &until,
            "--speed",
            "max",
        ],
    );
    let out = String::from_utf8(out).unwrap();
    assert!(
        out.contains("replayed 4 of 21 lines") && out.contains("4 acknowledged, 0 rejected"),
        "{out}"
    );
    assert!(
        err.contains("line 21: not valid JSON"),
        "the bad line is reported: {err}"
    );

    // Everything at 50x the recorded pace: the 4 camera batches already sent are refused
    // (duplicate_seq), and so are the radar batches at t0+1.5, 2.5 and 3.5 s, older than the
    // newest accepted scan (t0+4 s) with reorder_window 0 (late_scan): 7 refusals, each
    // reported with its line; the exit status says so.
    let (st, out, err) = run_to_end(
        &bin,
        &[
            "replay",
            r,
            "--to",
            &url,
            "--token",
            &camera_token,
            "--token",
            &radar_token,
            "--speed",
            "50",
        ],
    )
    .unwrap();
    assert_eq!(st.code(), Some(1), "{err}");
    let out = String::from_utf8(out).unwrap();
    assert!(out.contains("13 acknowledged, 7 rejected"), "{out}");
    assert!(
        err.contains("line 1: batch seq 1 from \"quay-camera\" rejected:")
            && err.contains("(duplicate_seq)"),
        "{err}"
    );
    assert!(
        err.contains("line 6: batch seq 3 from \"sound-radar\" rejected:")
            && err.contains("(late_scan)"),
        "{err}"
    );
    assert!(err.contains("7 of 20 batches were rejected"), "{err}");

    // A recording naming a sensor the site does not have.
    let odd = write_file(
        &dir,
        "odd.jsonl",
        r#"{"sensor":"lighthouse","seq":1,"time":1764600100.0,"detections":[]}"#,
    );
    // (The camera's token opens the connection; the batch is refused for its sensor.)
    let lighthouse = format!("lighthouse={CAMERA_TOKEN}");
    let (st, _, err) = run_to_end(
        &bin,
        &[
            "replay",
            odd.to_str().unwrap(),
            "--to",
            &url,
            "--token",
            &lighthouse,
        ],
    )
    .unwrap();
    assert_eq!(st.code(), Some(1));
    assert!(
        err.contains("(unknown_sensor)") && err.contains("\"lighthouse\" is not configured"),
        "{err}"
    );

    // A missing recording, and a server that is not there.
    let (st, _, err) =
        run_to_end(&bin, &["replay", "/nonexistent/rec.jsonl", "--to", &url]).unwrap();
    assert_eq!(st.code(), Some(1));
    assert!(
        err.contains("cannot open the recording /nonexistent/rec.jsonl"),
        "{err}"
    );
    let port = std::net::TcpListener::bind("127.0.0.1:0")
        .unwrap()
        .local_addr()
        .unwrap()
        .port();
    let nowhere = format!("ws://127.0.0.1:{port}/v1/ingest");
    let (st, _, err) = run_to_end(&bin, &["replay", r, "--to", &nowhere]).unwrap();
    assert_eq!(st.code(), Some(1));
    assert!(
        err.contains(&format!(
            "cannot connect to {nowhere} for sensor \"quay-camera\""
        )) && err.contains("is the service running there?"),
        "{err}"
    );
    let (st, _, err) = run_to_end(&bin, &["replay", r, "--to", &url, "--speed", "0"]).unwrap();
    assert_eq!(st.code(), Some(2));
    assert!(err.contains("must be a factor > 0"), "{err}");
}

/// `--shift-to-now`: the first batch is stamped with the moment the replay starts and the
/// recorded spacing between batch times is kept exactly (one offset for all).
#[tokio::test]
async fn shift_to_now_moves_every_time_by_one_offset() {
    let bin = plotweave_bin!();
    let dir = temp_dir("replay-shift");
    let cfg = write_file(
        &dir,
        "site.toml",
        &site_toml("max_batches_per_second = 100000.0"),
    );
    let t0 = 1_000_000_000.0; // 2001: far in the past
    let offsets = [0.0, 0.25, 1.5, 1.75, 3.0];
    let text: String = offsets
        .iter()
        .enumerate()
        .map(|(k, dt)| camera_batch(k as u64 + 1, t0 + dt, &[]).to_string() + "\n")
        .collect();
    let rec = write_file(&dir, "rec.jsonl", &text);
    let server = Server::start(&bin, &["serve", "--config", cfg.to_str().unwrap()]).unwrap();
    let mut frames = ws_connect(&server.ws_url("/v1/frames"), Some(READ_TOKEN))
        .await
        .unwrap();
    let before = std::time::SystemTime::now()
        .duration_since(std::time::UNIX_EPOCH)
        .unwrap()
        .as_secs_f64();
    let token = format!("quay-camera={CAMERA_TOKEN}");
    let url = server.ws_url("/v1/ingest");
    run_ok(
        &bin,
        &[
            "replay",
            rec.to_str().unwrap(),
            "--to",
            &url,
            "--token",
            &token,
            "--speed",
            "max",
            "--shift-to-now",
        ],
    );
    let mut times = Vec::new();
    for _ in offsets {
        times.push(
            next_json(&mut frames).await.unwrap()["time"]
                .as_f64()
                .unwrap(),
        );
    }
    assert!(
        times[0] >= before && times[0] < before + 10.0,
        "{times:?} vs {before}"
    );
    for (t, dt) in times.iter().zip(offsets) {
        // One offset added to every time: differences are kept to float rounding at 1.7e9 s.
        assert!((t - times[0] - dt).abs() < 1e-6, "{times:?}");
    }
}
