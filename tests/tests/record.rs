//! `[server.recording]`: every acknowledged batch is on disk (fsync policy, SIGKILL right after
//! the acks), files sort in time order and rotate by size, a journal torn in the middle of a
//! line is read up to the tear, and recording keys are validated.

use std::path::{Path, PathBuf};

use plotweave_tests::*;

fn recording_site(dir: &Path, sync: &str, extra: &str) -> PathBuf {
    let rec = dir.join("rec");
    write_file(
        dir,
        "site.toml",
        &site_toml(&format!(
            "max_batches_per_second = 100000.0\n\n[server.recording]\nenabled = true\ndirectory = {:?}\nsync = \"{sync}\"\n{extra}",
            rec.display()
        )),
    )
}

/// Every line of every recording file, in `ls` order, parsed.
fn recorded(dir: &Path) -> (Vec<PathBuf>, Vec<serde_json::Value>) {
    let mut files: Vec<PathBuf> = std::fs::read_dir(dir)
        .unwrap()
        .map(|e| e.unwrap().path())
        .collect();
    files.sort();
    let mut lines = Vec::new();
    for f in &files {
        let text = std::fs::read_to_string(f).unwrap();
        for l in text.split_inclusive('\n') {
            // After SIGKILL only the newest file may end in an unacknowledged torn line.
            if let Ok(v) = serde_json::from_str(l) {
                lines.push(v);
            }
        }
    }
    (files, lines)
}

#[tokio::test]
async fn with_fsync_every_acked_batch_survives_sigkill_in_arrival_order() {
    let dir = temp_dir("record-kill");
    let cfg = recording_site(&dir, "fsync", "rotate_bytes = 8192");
    let mut server = Server::start(
        &plotweave_bin!(),
        &["serve", "--config", cfg.to_str().unwrap()],
    )
    .unwrap();
    let mut camera = ws_connect(&server.ws_url("/v1/ingest"), Some(CAMERA_TOKEN))
        .await
        .unwrap();
    let mut radar = ws_connect(&server.ws_url("/v1/ingest"), Some(RADAR_TOKEN))
        .await
        .unwrap();
    let t0 = 1_764_600_000.0;
    let mut acked = Vec::new();
    for k in 1..=120u64 {
        let t = t0 + k as f64 * 0.5;
        let (ws, batch, id) = if k % 3 == 0 {
            (
                &mut radar,
                radar_batch(k / 3, t, &[(900.0 + k as f64, 30.0)]),
                "sound-radar",
            )
        } else {
            let seq = k - k / 3;
            (
                &mut camera,
                camera_batch(seq, t, &[(450.0 + k as f64, 780.0)]),
                "quay-camera",
            )
        };
        let seq = batch["seq"].as_u64().unwrap();
        let reply = send_batch(ws, &batch).await.unwrap();
        assert_eq!(
            reply,
            serde_json::json!({"ack": seq}),
            "{}",
            server.stderr()
        );
        acked.push((id.to_string(), seq, t));
    }
    // A few more in flight (not waited for), then kill without any chance to flush.
    for k in 81..=90u64 {
        send_text(
            &mut camera,
            camera_batch(k, t0 + 100.0 + k as f64, &[]).to_string(),
        )
        .await
        .unwrap();
    }
    server.sigkill().unwrap();

    let (files, lines) = recorded(&dir.join("rec"));
    assert!(
        files.len() >= 2,
        "8 KiB rotation should give several files: {files:?}"
    );
    for f in &files {
        let name = f.file_name().unwrap().to_str().unwrap();
        assert!(
            name.starts_with("rec-") && name.ends_with(".jsonl"),
            "{name}"
        );
    }
    // The acknowledged batches come first, in the order they were sent, each whole.
    assert!(
        lines.len() >= acked.len(),
        "{} lines for {} acks",
        lines.len(),
        acked.len()
    );
    for (i, (id, seq, t)) in acked.iter().enumerate() {
        let l = &lines[i];
        assert_eq!(
            (l["sensor"].as_str(), l["seq"].as_u64()),
            (Some(id.as_str()), Some(*seq)),
            "line {i}: {l}"
        );
        assert_eq!(l["time"].as_f64(), Some(*t));
        assert_eq!(l["detections"].as_array().map(Vec::len), Some(1));
        assert!(
            l["recv"].as_f64().is_some_and(|r| r > 1.7e9),
            "no recv: {l}"
        );
    }
    // recv is arrival order: non-decreasing across files.
    let recv: Vec<f64> = lines.iter().map(|l| l["recv"].as_f64().unwrap()).collect();
    assert!(recv.windows(2).all(|w| w[0] <= w[1]));
}

/// A journal cut in the middle of its last line (a crash mid-write): `batch` reports the torn
/// line with its number, and the frames of the lines before it are exactly those of the intact
/// prefix.
#[test]
fn a_journal_torn_mid_line_is_read_up_to_the_tear() {
    let bin = plotweave_bin!();
    let dir = temp_dir("record-torn");
    let cfg = write_file(&dir, "site.toml", &site_toml(""));
    let lines: Vec<String> = (1..=30u64)
        .map(|k| {
            camera_batch(
                k,
                1_764_600_000.0 + k as f64,
                &[(100.0 + 5.0 * k as f64, 900.0)],
            )
            .to_string()
        })
        .collect();
    let intact = write_file(&dir, "intact.jsonl", &(lines[..29].join("\n") + "\n"));
    let last = &lines[29];
    let torn_text = lines[..29].join("\n") + "\n" + &last[..last.len() / 2];
    let torn = write_file(&dir, "torn.jsonl", &torn_text);
    let run = |input: &Path| {
        let (st, out, err) = run_to_end(
            &bin,
            &[
                "batch",
                "--config",
                cfg.to_str().unwrap(),
                "--input",
                input.to_str().unwrap(),
                "--output",
                "-",
            ],
        )
        .unwrap();
        assert!(st.success(), "{err}");
        (out, err)
    };
    let (out_torn, err_torn) = run(&torn);
    let (out_intact, _) = run(&intact);
    assert!(
        err_torn
            .lines()
            .any(|l| l.starts_with("line 30: torn last line") && l.ends_with("skipped")),
        "{err_torn}"
    );
    assert!(
        err_torn.contains("29 batches used, 1 skipped; 29 frames written"),
        "{err_torn}"
    );
    assert_eq!(out_torn, out_intact);
}

#[test]
fn recording_keys_are_validated() {
    let bin = plotweave_bin!();
    let dir = temp_dir("record-check");
    let cfg = write_file(
        &dir,
        "site.toml",
        &site_toml(
            "[server.recording]\nenabled = true\nsync = \"sometimes\"\nrotate_bytes = 10\nsync_interval_ms = 5",
        ),
    );
    let (st, _, err) = run_to_end(&bin, &["check", "--config", cfg.to_str().unwrap()]).unwrap();
    assert_eq!(st.code(), Some(2), "{err}");
    for key in [
        "server.recording.sync: must be \"none\", \"flush\", \"fsync\" or \"interval\", got \"sometimes\"",
        "server.recording.rotate_bytes: must be an integer in [4096,",
        "server.recording.sync_interval_ms: only used with sync = \"interval\"",
        "server.recording.directory: required",
    ] {
        assert!(err.contains(key), "missing {key:?} in {err}");
    }
}

#[tokio::test]
async fn interval_policy_records_and_a_clean_stop_flushes() {
    let dir = temp_dir("record-interval");
    let cfg = recording_site(
        &dir,
        "interval",
        "sync_interval_ms = 50\nrotate_seconds = 3600",
    );
    let mut server = Server::start(
        &plotweave_bin!(),
        &["serve", "--config", cfg.to_str().unwrap()],
    )
    .unwrap();
    let mut camera = ws_connect(&server.ws_url("/v1/ingest"), Some(CAMERA_TOKEN))
        .await
        .unwrap();
    for k in 1..=20u64 {
        let reply = send_batch(
            &mut camera,
            &camera_batch(k, 1_764_600_000.0 + k as f64, &[]),
        )
        .await
        .unwrap();
        assert_eq!(reply, serde_json::json!({"ack": k}));
    }
    drop(camera);
    server.sigterm().unwrap();
    assert!(
        server.wait_exit(WAIT).unwrap().success(),
        "{}",
        server.stderr()
    );
    let (files, lines) = recorded(&dir.join("rec"));
    assert_eq!(files.len(), 1);
    let seqs: Vec<u64> = lines.iter().map(|l| l["seq"].as_u64().unwrap()).collect();
    assert_eq!(seqs, (1..=20).collect::<Vec<_>>());

    // The recording replays into a staging server (paced by its recv clock, 20x faster).
    let staging_cfg = write_file(
        &dir,
        "staging.toml",
        &site_toml("max_batches_per_second = 1000.0"),
    );
    let staging = Server::start(
        &plotweave_bin!(),
        &["serve", "--config", staging_cfg.to_str().unwrap()],
    )
    .unwrap();
    let token = format!("quay-camera={CAMERA_TOKEN}");
    let (st, out, err) = run_to_end(
        &plotweave_bin!(),
        &[
            "replay",
            files[0].to_str().unwrap(),
            "--to",
            &staging.ws_url("/v1/ingest"),
            "--token",
            &token,
            "--speed",
            "20",
        ],
    )
    .unwrap();
    assert!(st.success(), "{err}");
    let out = String::from_utf8(out).unwrap();
    assert!(
        out.contains("replayed 20 of 20 lines") && out.contains("20 acknowledged"),
        "{out}"
    );
}

/// The recorder's metrics agree with the files on disk. With `fsync` and one batch at a time
/// (each acknowledgement awaited) every batch is one writer pass with one fsync, and each
/// rotation syncs the file it closes; the bytes are the files' total size. Removing the
/// directory under the running server makes the next rotation fail: each batch of such a pass
/// is refused `internal` and the pass is counted as a write error.
#[tokio::test]
async fn recording_metrics_match_the_files_and_count_failed_rotations() {
    let dir = temp_dir("record-metrics");
    let rec = dir.join("rec");
    let cfg = recording_site(&dir, "fsync", "rotate_bytes = 4096");
    let server = Server::start(
        &plotweave_bin!(),
        &["serve", "--config", cfg.to_str().unwrap()],
    )
    .unwrap();
    let get = |m: &prometheus_parse::Scrape, name: &str| {
        sample(m, name, &[]).unwrap_or_else(|| panic!("no sample {name}"))
    };
    let m = scrape(&server.addr).await.unwrap();
    for name in [
        "plotweave_recording_batches_total",
        "plotweave_recording_bytes_total",
        "plotweave_recording_fsyncs_total",
        "plotweave_recording_write_errors_total",
        "plotweave_recording_commit_seconds_count",
        "plotweave_recording_queue_depth",
    ] {
        assert_eq!(get(&m, name), 0.0, "{name} before any batch");
    }

    let mut camera = ws_connect(&server.ws_url("/v1/ingest"), Some(CAMERA_TOKEN))
        .await
        .unwrap();
    let t0 = 1_764_600_000.0;
    let n = 90u64;
    for k in 1..=n {
        let b = camera_batch(k, t0 + k as f64, &[(300.0 + k as f64, 640.0)]);
        assert_eq!(
            send_batch(&mut camera, &b).await.unwrap(),
            serde_json::json!({ "ack": k })
        );
    }
    let m = scrape(&server.addr).await.unwrap();
    let (files, lines) = recorded(&rec);
    let on_disk: u64 = files
        .iter()
        .map(|f| std::fs::metadata(f).unwrap().len())
        .sum();
    assert!(files.len() >= 3, "{files:?}");
    assert_eq!(lines.len() as u64, n);
    assert_eq!(get(&m, "plotweave_recording_batches_total"), n as f64);
    assert_eq!(get(&m, "plotweave_recording_bytes_total"), on_disk as f64);
    let rotations = files.len() as f64 - 1.0;
    assert_eq!(
        get(&m, "plotweave_recording_fsyncs_total"),
        n as f64 + rotations
    );
    assert_eq!(
        get(&m, "plotweave_recording_commit_seconds_count"),
        n as f64
    );
    assert!(get(&m, "plotweave_recording_commit_seconds_sum") > 0.0);
    assert_eq!(get(&m, "plotweave_recording_queue_depth"), 0.0);
    assert_eq!(get(&m, "plotweave_recording_write_errors_total"), 0.0);

    // Pull the directory out from under the server: the open file still takes lines, the
    // next rotation cannot create its file.
    std::fs::remove_dir_all(&rec).unwrap();
    let (mut ok, mut refused) = (0u64, 0u64);
    for k in n + 1..=n + 60 {
        let b = camera_batch(k, t0 + k as f64, &[(300.0 + k as f64, 640.0)]);
        let reply = send_batch(&mut camera, &b).await.unwrap();
        match error_code(&reply) {
            None => {
                assert_eq!(refused, 0, "acked after a failed rotation: {reply}");
                ok += 1;
            }
            Some("internal") => {
                let msg = reply["error"]["message"].as_str().unwrap();
                assert!(
                    msg.contains("not recorded") && msg.contains("cannot write the recording"),
                    "{msg}"
                );
                refused += 1;
            }
            Some(other) => panic!("unexpected {other}: {reply}"),
        }
    }
    assert!(refused > 0 && ok > 0, "ok {ok}, refused {refused}");
    let m = scrape(&server.addr).await.unwrap();
    assert_eq!(
        get(&m, "plotweave_recording_write_errors_total"),
        refused as f64
    );
    assert_eq!(
        get(&m, "plotweave_recording_batches_total"),
        (n + ok) as f64
    );
    assert_eq!(
        get(&m, "plotweave_recording_commit_seconds_count"),
        (n + ok + refused) as f64
    );
    assert_eq!(
        sample(
            &m,
            "plotweave_batches_rejected_total",
            &[("sensor", "quay-camera"), ("reason", "internal")]
        ),
        Some(refused as f64)
    );
    assert_eq!(get(&m, "plotweave_recording_queue_depth"), 0.0);
}
