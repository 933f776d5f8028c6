//! `plotweave batch`: the offline run is deterministic byte for byte, writes one frame per
//! accepted batch, reports bad lines with their number and skips them; `check` names every
//! broken key.

use plotweave_tests::*;

/// A recording of both sensors interleaved in time order, with bad lines at known numbers.
fn recording() -> (String, Vec<(usize, &'static str)>, usize) {
    let t0 = 1_764_600_000.0;
    let mut lines = Vec::new();
    let mut bad = Vec::new();
    let mut good = 0;
    let (mut radar_seq, mut camera_seq) = (0u64, 0u64);
    for k in 0..40u64 {
        let t = t0 + k as f64 * 0.5;
        let batch = if k % 2 == 0 {
            radar_seq += 1;
            // A target at range 900 + 3t m on bearing 30°, and clutter-like returns.
            radar_batch(
                radar_seq,
                t,
                &[
                    (900.0 + 3.0 * k as f64, 30.0),
                    (2500.0 - 7.0 * k as f64, 200.0 + k as f64),
                ],
            )
        } else {
            camera_seq += 1;
            camera_batch(
                camera_seq,
                t,
                &[(450.0 + 1.5 * k as f64, 779.4 + 2.6 * k as f64)],
            )
        };
        lines.push(batch.to_string());
        good += 1;
        match k {
            5 => {
                lines.push("{not json".into());
                bad.push((lines.len(), "not valid JSON"));
            }
            11 => {
                lines.push(radar_batch(radar_seq, t, &[]).to_string());
                bad.push((lines.len(), "duplicate_seq"));
            }
            17 => {
                lines.push(String::new());
                bad.push((lines.len(), "empty line"));
            }
            23 => {
                lines.push(r#"{"sensor":"quay-camera","seq":999,"time":1764600011.5,"detections":[{"x":1,"y":null}]}"#.into());
                bad.push((lines.len(), "detections[0].y"));
            }
            _ => {}
        }
    }
    (lines.join("\n") + "\n", bad, good)
}

#[test]
fn batch_is_deterministic_and_reports_bad_lines() {
    let bin = plotweave_bin!();
    let dir = temp_dir("batch");
    let cfg = write_file(&dir, "site.toml", &site_toml(""));
    let (text, bad, good) = recording();
    let rec = write_file(&dir, "rec.jsonl", &text);
    let run = |out: &str| {
        let (st, stdout, stderr) = run_to_end(
            &bin,
            &[
                "batch",
                "--config",
                cfg.to_str().unwrap(),
                "--input",
                rec.to_str().unwrap(),
                "--output",
                out,
            ],
        )
        .unwrap();
        assert!(st.success(), "{stderr}");
        (stdout, stderr)
    };
    let out1 = dir.join("frames1.jsonl");
    let out2 = dir.join("frames2.jsonl");
    let (_, stderr1) = run(out1.to_str().unwrap());
    let (_, stderr2) = run(out2.to_str().unwrap());
    let (stdout3, _) = run("-");
    let a = std::fs::read(&out1).unwrap();
    let b = std::fs::read(&out2).unwrap();
    assert!(!a.is_empty());
    assert_eq!(a, b, "two runs differ");
    assert_eq!(a, stdout3, "--output - differs from the file");
    assert_eq!(stderr1, stderr2);

    // One frame per accepted batch, in input order (reorder window 0), each a contract frame.
    let frames: Vec<serde_json::Value> = String::from_utf8(a)
        .unwrap()
        .lines()
        .map(|l| serde_json::from_str(l).unwrap())
        .collect();
    assert_eq!(frames.len(), good);
    for f in &frames {
        for key in ["time", "sensor", "seq", "tracks", "ended"] {
            assert!(f.get(key).is_some(), "frame lacks {key}: {f}");
        }
        for t in f["tracks"].as_array().unwrap() {
            for key in ["id", "status", "x", "y", "vx", "vy"] {
                assert!(t.get(key).is_some(), "track lacks {key}: {t}");
            }
        }
    }
    let times: Vec<f64> = frames.iter().map(|f| f["time"].as_f64().unwrap()).collect();
    assert!(times.windows(2).all(|w| w[0] <= w[1]));

    // Each bad line is reported with its line number, and nothing else is.
    for (line, fragment) in &bad {
        let report = stderr1
            .lines()
            .find(|l| l.starts_with(&format!("line {line}: ")))
            .unwrap_or_else(|| panic!("line {line} not reported:\n{stderr1}"));
        assert!(
            report.contains(fragment) && report.ends_with("skipped"),
            "{report}"
        );
    }
    assert_eq!(
        stderr1.lines().filter(|l| l.starts_with("line ")).count(),
        bad.len(),
        "{stderr1}"
    );
    assert!(
        stderr1.contains(&format!(
            "{good} batches used, {} skipped; {good} frames written",
            bad.len()
        )),
        "{stderr1}"
    );
}

#[test]
fn batch_with_a_missing_input_fails_clearly() {
    let bin = plotweave_bin!();
    let dir = temp_dir("batch-missing");
    let cfg = write_file(&dir, "site.toml", &site_toml(""));
    let (st, _, stderr) = run_to_end(
        &bin,
        &[
            "batch",
            "--config",
            cfg.to_str().unwrap(),
            "--input",
            "/nonexistent/rec.jsonl",
            "--output",
            "-",
        ],
    )
    .unwrap();
    assert_eq!(st.code(), Some(1));
    assert!(
        stderr.contains("cannot open the recording /nonexistent/rec.jsonl"),
        "{stderr}"
    );
}

#[test]
fn check_names_every_broken_key() {
    let bin = plotweave_bin!();
    let dir = temp_dir("check");
    let broken = site_toml("queue_depth = 0\nmax_batches_per_second = -2.0")
        .replace(
            "detection_probability = 0.9\nclutter_rate = 0.1",
            "detection_probability = 1.3\nclutter_rate = 0.1",
        )
        .replace(
            "noise = { range = 10.0, bearing_deg = 0.5 }",
            "noise = { range = 10.0, bearing_deg = 0.5, sigma = 1.0 }",
        )
        .replace(
            "association = \"jpda\"",
            "association = \"nearest\"\ncolour = \"blue\"",
        );
    let cfg = write_file(&dir, "broken.toml", &broken);
    let (st, _, stderr) = run_to_end(&bin, &["check", "--config", cfg.to_str().unwrap()]).unwrap();
    assert_eq!(st.code(), Some(2), "{stderr}");
    for key in [
        "tracker.colour: unknown field `colour`",
        "sensor[1].detection_probability: must be in (0, 1], got 1.3",
        "sensor[0].noise.sigma: cartesian noise key on a polar sensor",
        "server.limits.queue_depth: must be an integer in [1, 1000000], got 0",
        "server.limits.max_batches_per_second: must be finite and > 0 batches/s, got -2",
    ] {
        assert!(stderr.contains(key), "missing {key:?} in:\n{stderr}");
    }
    assert!(stderr.contains("broken.toml: 5 problems"), "{stderr}");

    let good = write_file(&dir, "good.toml", &site_toml(""));
    let (st, stdout, stderr) =
        run_to_end(&bin, &["check", "--config", good.to_str().unwrap()]).unwrap();
    assert!(st.success(), "{stderr}");
    let out = String::from_utf8(stdout).unwrap();
    assert!(
        out.contains("site \"Gannet Sound\": configuration is valid"),
        "{out}"
    );
    assert!(out.contains("sensor \"quay-camera\": cartesian"), "{out}");
    assert!(!out.contains(CAMERA_TOKEN), "a token was printed");
}
