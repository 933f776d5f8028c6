//! `simulate` → `batch` → `score` on the shipped Kestrel Bay scenarios: deterministic, and the
//! mean GOSPA stays under a bound argued from the sensors' noise and the cost of confirmation;
//! bad input to `simulate` and `score` gets a clear message and a non-zero exit.

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

/// simulate + batch + score --json of a shipped scenario; (score JSON, recording bytes).
fn pipeline(bin: &Path, dir: &Path, scenario: &str) -> (serde_json::Value, Vec<u8>) {
    let p = |n: &str| dir.join(n).to_str().unwrap().to_string();
    let scenario = examples().join(scenario);
    let site = examples().join("kestrel-bay-site.toml");
    run_ok(
        bin,
        &[
            "simulate",
            "--scenario",
            scenario.to_str().unwrap(),
            "--output",
            &p("rec.jsonl"),
            "--truth",
            &p("truth.jsonl"),
        ],
    );
    run_ok(
        bin,
        &[
            "batch",
            "--config",
            site.to_str().unwrap(),
            "--input",
            &p("rec.jsonl"),
            "--output",
            &p("frames.jsonl"),
        ],
    );
    let (out, _) = run_ok(
        bin,
        &[
            "score",
            "--truth",
            &p("truth.jsonl"),
            "--frames",
            &p("frames.jsonl"),
            "--json",
            "--plot",
            &p("plot.svg"),
        ],
    );
    let score = serde_json::from_slice(&out).unwrap();
    (score, std::fs::read(p("rec.jsonl")).unwrap())
}

/// The crossing scenario (two vessels, 300 s, c = 50 m, p = 2). The bound on the mean of d² per
/// frame, and so (Jensen: mean d ≤ √mean d²) on the mean GOSPA, is the sum of three parts,
/// each from the scenario's parameters and not from a run:
///
/// * localisation: a track's squared position error is at most that of a single fix of the
///   sensor that sees the vessel (a Kalman update never leaves the position less certain than
///   the fix it used, common practice), allowing a factor 2 for the prediction between scans
///   and missed detections. The camera fix: 2σ² = 2·4² = 32 m², so 64 m² per vessel. Petrel
///   is outside the camera's view (y > 2400 m) for its first (2700 − 2400)/8 = 37.5 s, seen by
///   the radar alone at ≤ 2700 m: σ_r² + (r σ_b)² = 15² + (2700 · 0.6° in rad)² ≈ 225 + 799 =
///   1024 m², times 2 again, for 37.5 of 300 s: 2048 · 0.125 = 256 m² on average. Total
///   64 + 64 + 256 = 384 m².
/// * missed: each vessel is missed until its track is confirmed; with the camera scanning at
///   1 Hz (P_D 0.8) and the radar every 2.5 s (P_D 0.9) and confirmation at existence 0.95,
///   allow 15 s, i.e. 15 · 1.4 = 21 frames of c²/2 = 1250 m² each, per vessel, over the 420
///   frames: 2 · 21 · 1250 / 420 = 125 m².
/// * false tracks: allow one confirmed false track in 5 % of the frames: 0.05 · 1250 = 62.5 m².
///
/// Mean d² ≤ 384 + 125 + 62.5 = 571.5 m², so mean d ≤ 23.9 m.
#[test]
fn crossing_scenario_scores_under_the_argued_gospa_bound() {
    let bin = plotweave_bin!();
    let dir = temp_dir("score-crossing");
    let (s, rec) = pipeline(&bin, &dir, "kestrel-bay-crossing.scenario.toml");
    let mean_d2 = s["mean_localisation"].as_f64().unwrap()
        + s["mean_missed"].as_f64().unwrap()
        + s["mean_false"].as_f64().unwrap();
    let bound_d2 = 384.0 + 125.0 + 62.5;
    assert_eq!(s["frames"], 420);
    assert_eq!(s["unscored_scans"], 0);
    assert!(
        mean_d2 <= bound_d2,
        "mean d² {mean_d2} m² > {bound_d2}: {s:#}"
    );
    let mean_d = s["mean_gospa"].as_f64().unwrap();
    assert!(
        mean_d <= bound_d2.sqrt(),
        "mean GOSPA {mean_d} m > {}",
        bound_d2.sqrt()
    );
    eprintln!("crossing: mean GOSPA {mean_d:.3} m, mean d² {mean_d2:.1} m² (bound {bound_d2})");

    // Same scenario, same seed: the same recording, byte for byte.
    let dir2 = temp_dir("score-crossing-again");
    let (s2, rec2) = pipeline(&bin, &dir2, "kestrel-bay-crossing.scenario.toml");
    assert_eq!(rec, rec2);
    assert_eq!(s, s2);
    let svg = std::fs::read_to_string(dir.join("plot.svg")).unwrap();
    assert!(
        svg.starts_with("<svg") && svg.contains("GOSPA over time"),
        "plot lacks its text"
    );
}

#[test]
fn morning_scenario_runs_and_every_object_is_tracked_most_of_the_time() {
    let bin = plotweave_bin!();
    let dir = temp_dir("score-morning");
    let (s, _) = pipeline(&bin, &dir, "kestrel-bay-morning.scenario.toml");
    let frames = s["per_frame"].as_array().unwrap();
    let objects: usize = frames
        .iter()
        .map(|f| f["objects"].as_u64().unwrap() as usize)
        .sum();
    let missed: usize = frames
        .iter()
        .map(|f| f["n_missed"].as_u64().unwrap() as usize)
        .sum();
    // Most object-frames are paired: the trawler at up to ~5 km has a cross-range σ of
    // 5000 · 0.6° ≈ 52 m, about c, so some of its frames are missed by construction; the
    // other three vessels are close in. Bound: less than a quarter of object-frames missed.
    assert!(
        missed * 4 < objects,
        "{missed} of {objects} object-frames missed"
    );
    eprintln!("morning: mean GOSPA {} m", s["mean_gospa"]);
}

#[test]
fn bad_input_to_simulate_and_score_is_named() {
    let bin = plotweave_bin!();
    let dir = temp_dir("score-bad");
    let p = |n: &str| dir.join(n).to_str().unwrap().to_string();
    let (st, _, err) = run_to_end(
        &bin,
        &[
            "simulate",
            "--scenario",
            "/nonexistent/s.toml",
            "--output",
            &p("r"),
            "--truth",
            &p("t"),
        ],
    )
    .unwrap();
    assert_eq!(st.code(), Some(1));
    assert!(
        err.contains("cannot read the scenario /nonexistent/s.toml"),
        "{err}"
    );

    let good =
        std::fs::read_to_string(examples().join("kestrel-bay-crossing.scenario.toml")).unwrap();
    let broken = good
        .replace("duration = 300.0", "duration = 300.0\nspeed = 2")
        .replace("rate_deg_s = -3.0", "rate = -3.0")
        .replace("detection_probability = 0.8", "detection_probability = 0.0");
    let sc = write_file(&dir, "broken.toml", &broken);
    let (st, _, err) = run_to_end(
        &bin,
        &[
            "simulate",
            "--scenario",
            sc.to_str().unwrap(),
            "--output",
            &p("r"),
            "--truth",
            &p("t"),
        ],
    )
    .unwrap();
    assert_eq!(st.code(), Some(2), "{err}");
    for key in [
        "scenario.speed: unknown field `speed`",
        "target[1].legs[1].rate: unknown field `rate`",
        "sensor[1].detection_probability: must be in (0, 1], got 0",
    ] {
        assert!(err.contains(key), "missing {key:?} in {err}");
    }

    // score: missing file, a line that is not a frame, a frame from another run.
    let truth = write_file(
        &dir,
        "truth.jsonl",
        r#"{"time":1.0,"sensor":"s","seq":1,"objects":[{"name":"a","x":0.0,"y":0.0,"vx":0.0,"vy":0.0}]}"#,
    );
    let (st, _, err) = run_to_end(
        &bin,
        &["score", "--truth", "/nonexistent/t", "--frames", &p("f")],
    )
    .unwrap();
    assert_eq!(st.code(), Some(1));
    assert!(
        err.contains("cannot open the truth file /nonexistent/t"),
        "{err}"
    );
    let frames = write_file(
        &dir,
        "frames.jsonl",
        "{\"time\":1.0,\"sensor\":\"s\",\"seq\":1,\"tracks\":[],\"ended\":[]}\n{\"time\":2.0,\"sensor\":\"s\"}\n",
    );
    let (st, _, err) = run_to_end(
        &bin,
        &[
            "score",
            "--truth",
            truth.to_str().unwrap(),
            "--frames",
            frames.to_str().unwrap(),
        ],
    )
    .unwrap();
    assert_eq!(st.code(), Some(1));
    assert!(
        err.contains("frames.jsonl line 2: not a track frame: missing field"),
        "{err}"
    );
    let frames = write_file(
        &dir,
        "other.jsonl",
        "{\"time\":1.0,\"sensor\":\"s\",\"seq\":7,\"tracks\":[],\"ended\":[]}\n",
    );
    let (st, _, err) = run_to_end(
        &bin,
        &[
            "score",
            "--truth",
            truth.to_str().unwrap(),
            "--frames",
            frames.to_str().unwrap(),
            "--cutoff=-3",
        ],
    )
    .unwrap();
    assert_eq!(st.code(), Some(1));
    assert!(
        err.contains("GOSPA cut-off c must be finite and greater than 0, got -3"),
        "{err}"
    );
    let (st, _, err) = run_to_end(
        &bin,
        &[
            "score",
            "--truth",
            truth.to_str().unwrap(),
            "--frames",
            frames.to_str().unwrap(),
        ],
    )
    .unwrap();
    assert_eq!(st.code(), Some(1));
    assert!(
        err.contains("other.jsonl line 1: frame of sensor \"s\" seq 7 has no truth line"),
        "{err}"
    );
}
