//! The wire reference `docs/wire.md`, the JSON Schemas of `docs/schema/` and the service agree.
//!
//! The reference implementation of JSON Schema here is the `jsonschema` crate (draft 2020-12,
//! a general-purpose validator, not part of this project). Checked:
//! - each schema is itself valid against the draft 2020-12 meta-schema;
//! - every JSON example of `docs/wire.md` carries a `<!-- schema: NAME[, invalid] -->` marker
//!   and validates (or, when marked invalid, fails) against that schema;
//! - the valid batch examples are accepted by `plotweave batch` on the demo site and the
//!   invalid ones refused, so the schema and the service draw the line in the same place, and
//!   the first frame example is the very frame the binary writes for the last of them;
//! - real frames of a longer recording validate, and keep the promises a schema cannot state
//!   (ids ascending and never reused, `ended` ids gone from the picture);
//! - real replies of a running server (acks, errors, HTTP error bodies, `/v1/tracks`) validate.

use std::path::{Path, PathBuf};

use plotweave_tests::*;
use serde_json::{Value, json};

fn repo() -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR")).join("..")
}

fn read(path: &Path) -> String {
    std::fs::read_to_string(path).unwrap_or_else(|e| panic!("cannot read {}: {e}", path.display()))
}

/// The validator of `docs/schema/NAME.schema.json`, after checking the schema itself.
fn schema(name: &str) -> jsonschema::Validator {
    let path = repo()
        .join("docs/schema")
        .join(format!("{name}.schema.json"));
    let doc: Value = serde_json::from_str(&read(&path))
        .unwrap_or_else(|e| panic!("{}: not JSON: {e}", path.display()));
    assert_eq!(
        doc["$schema"],
        "https://json-schema.org/draft/2020-12/schema",
        "{} must declare draft 2020-12",
        path.display()
    );
    if let Err(e) = jsonschema::meta::validate(&doc) {
        panic!("{} is not a valid JSON Schema: {e}", path.display());
    }
    jsonschema::validator_for(&doc)
        .unwrap_or_else(|e| panic!("{}: cannot compile: {e}", path.display()))
}

/// Every violation of `instance`, as `/path: message`.
fn violations(v: &jsonschema::Validator, instance: &Value) -> Vec<String> {
    v.iter_errors(instance)
        .map(|e| format!("{}: {e}", e.instance_path()))
        .collect()
}

fn assert_valid(v: &jsonschema::Validator, what: &str, instance: &Value) {
    let errors = violations(v, instance);
    assert!(
        errors.is_empty(),
        "{what} is invalid: {errors:#?}\n{instance}"
    );
}

/// One JSON example of `docs/wire.md`.
#[derive(Debug)]
struct Example {
    /// Line of the opening fence.
    line: usize,
    /// Schema name, or `none`.
    schema: String,
    /// Whether the example is marked `invalid`.
    invalid: bool,
    json: Value,
}

/// Every ```json block of `docs/wire.md`, each with the marker on the closest non-blank line
/// above it. A block without a marker fails the test: no example escapes validation.
fn examples() -> Vec<Example> {
    let text = read(&repo().join("docs/wire.md"));
    let lines: Vec<&str> = text.lines().collect();
    let mut out = Vec::new();
    let mut i = 0;
    while i < lines.len() {
        if lines[i].trim() != "```json" {
            i += 1;
            continue;
        }
        let fence = i + 1;
        let marker = lines[..i]
            .iter()
            .rev()
            .find(|l| !l.trim().is_empty())
            .and_then(|l| l.trim().strip_prefix("<!-- schema: "))
            .and_then(|l| l.strip_suffix(" -->"))
            .unwrap_or_else(|| {
                panic!(
                    "docs/wire.md:{fence}: json example without a `<!-- schema: NAME -->` marker"
                )
            });
        let (name, invalid) = match marker.split_once(", ") {
            Some((n, "invalid")) => (n, true),
            Some((_, other)) => panic!("docs/wire.md:{fence}: unknown marker flag {other:?}"),
            None => (marker, false),
        };
        let end = (i + 1..lines.len())
            .find(|&j| lines[j].trim() == "```")
            .unwrap_or_else(|| panic!("docs/wire.md:{fence}: unclosed code block"));
        let body = lines[i + 1..end].join("\n");
        let json: Value = serde_json::from_str(&body)
            .unwrap_or_else(|e| panic!("docs/wire.md:{fence}: example is not JSON: {e}"));
        out.push(Example {
            line: fence,
            schema: name.to_string(),
            invalid,
            json,
        });
        i = end + 1;
    }
    out
}

fn examples_of(name: &str, invalid: bool) -> Vec<Example> {
    examples()
        .into_iter()
        .filter(|e| e.schema == name && e.invalid == invalid)
        .collect()
}

#[test]
fn every_example_in_wire_md_matches_its_schema() {
    let all = examples();
    for name in ["batch", "frame", "reply", "skipped"] {
        let v = schema(name);
        let mine: Vec<&Example> = all.iter().filter(|e| e.schema == name).collect();
        assert!(
            mine.iter().any(|e| !e.invalid),
            "docs/wire.md has no valid {name} example"
        );
        for e in mine {
            let errors = violations(&v, &e.json);
            if e.invalid {
                assert!(
                    !errors.is_empty(),
                    "docs/wire.md:{}: marked invalid but the {name} schema accepts it",
                    e.line
                );
            } else {
                assert!(
                    errors.is_empty(),
                    "docs/wire.md:{}: invalid against the {name} schema: {errors:#?}",
                    e.line
                );
            }
        }
    }
    for e in &all {
        assert!(
            ["batch", "frame", "reply", "skipped", "none"].contains(&e.schema.as_str()),
            "docs/wire.md:{}: unknown schema {:?}",
            e.line,
            e.schema
        );
    }
    assert!(!examples_of("batch", true).is_empty());
    assert!(!examples_of("frame", true).is_empty());
}

/// The error-code table of docs/wire.md lists exactly the codes of the reply schema.
#[test]
fn error_code_table_matches_the_reply_schema() {
    let text = read(&repo().join("docs/wire.md"));
    let section = text
        .split("### Error codes")
        .nth(1)
        .and_then(|s| s.split("\n## ").next())
        .expect("docs/wire.md has a section `### Error codes`");
    let mut in_doc: Vec<String> = section
        .lines()
        .filter_map(|l| l.strip_prefix("| `"))
        .filter_map(|l| l.split_once('`').map(|(code, _)| code.to_string()))
        .collect();
    let doc: Value = serde_json::from_str(&read(&repo().join("docs/schema/reply.schema.json")))
        .expect("reply schema is JSON");
    let mut in_schema: Vec<String> =
        doc["oneOf"][1]["properties"]["error"]["properties"]["code"]["enum"]
            .as_array()
            .expect("reply schema lists the codes")
            .iter()
            .map(|c| c.as_str().expect("codes are strings").to_string())
            .collect();
    in_doc.sort();
    in_schema.sort();
    assert_eq!(in_doc, in_schema);
}

fn compact_lines(examples: &[Example]) -> String {
    examples.iter().map(|e| format!("{}\n", e.json)).collect()
}

/// Run `plotweave batch` on `recording` with site file `config`; (frames, stderr).
fn run_batch(config: &Path, recording: &str, dir: &Path) -> (Vec<Value>, String) {
    let input = write_file(dir, "rec.jsonl", recording);
    let (status, stdout, stderr) = run_to_end(
        &plotweave_bin!(),
        &[
            "batch",
            "--config",
            config.to_str().unwrap(),
            "--input",
            input.to_str().unwrap(),
            "--output",
            "-",
        ],
    )
    .unwrap();
    assert!(status.success(), "batch failed: {stderr}");
    let frames = String::from_utf8(stdout)
        .unwrap()
        .lines()
        .map(|l| serde_json::from_str(l).unwrap_or_else(|e| panic!("frame is not JSON: {e}\n{l}")))
        .collect();
    (frames, stderr)
}

#[test]
fn batch_examples_are_accepted_and_refused_by_the_service_as_by_the_schema() {
    let demo_site = repo().join("service/src/demo_site.toml");
    let frame_schema = schema("frame");
    let codes: Vec<String> = {
        let doc: Value =
            serde_json::from_str(&read(&repo().join("docs/schema/reply.schema.json"))).unwrap();
        doc["oneOf"][1]["properties"]["error"]["properties"]["code"]["enum"]
            .as_array()
            .unwrap()
            .iter()
            .map(|c| c.as_str().unwrap().to_string())
            .collect()
    };

    // Valid examples, in page order (which is time order): one frame each, nothing skipped.
    let good = examples_of("batch", false);
    let dir = temp_dir("schema-good");
    let (frames, stderr) = run_batch(&demo_site, &compact_lines(&good), &dir);
    let n = good.len();
    assert!(
        stderr.contains(&format!("{n} batches used, 0 skipped; {n} frames written")),
        "{stderr}"
    );
    for (f, e) in frames.iter().zip(&good) {
        assert_valid(
            &frame_schema,
            &format!("frame of docs/wire.md:{}", e.line),
            f,
        );
    }
    // The page says its first frame example is what the binary writes for the last batch.
    let first_frame = &examples_of("frame", false)[0];
    let last = frames.last().expect("frames were written");
    assert_eq!(
        *last, first_frame.json,
        "docs/wire.md:{} is no longer the frame `plotweave batch` writes; it now writes:\n{}",
        first_frame.line, last
    );

    // Invalid examples: each refused by the service too, reported with a documented code.
    let bad = examples_of("batch", true);
    let dir = temp_dir("schema-bad");
    let (frames, stderr) = run_batch(&demo_site, &compact_lines(&bad), &dir);
    assert!(frames.is_empty(), "the service accepted a refused example");
    for (k, e) in bad.iter().enumerate() {
        let report = stderr
            .lines()
            .find(|l| l.starts_with(&format!("line {}: ", k + 1)))
            .unwrap_or_else(|| {
                panic!(
                    "docs/wire.md:{}: not reported by the service:\n{stderr}",
                    e.line
                )
            });
        let code = report
            .strip_suffix("); skipped")
            .and_then(|r| r.rsplit_once(" ("))
            .map(|(_, c)| c)
            .unwrap_or_else(|| panic!("report without a code: {report}"));
        assert!(
            codes.iter().any(|c| c == code),
            "undocumented code in {report}"
        );
    }
}

/// A recording of the test site "Gannet Sound": a vessel crossing the camera's view while the
/// radar follows it, then leaving; scattered one-off returns that start and end tentative
/// tracks. Times in order, both sensors interleaved.
fn crossing_recording() -> String {
    let t0 = 1_764_600_000.0;
    let mut lines = Vec::new();
    let (mut radar_seq, mut camera_seq) = (0u64, 0u64);
    for k in 0..80u64 {
        let t = k as f64 * 0.5;
        // The vessel: from (200, 400) at (6, 3) m/s, seen until t = 25 s.
        let (x, y) = (200.0 + 6.0 * t, 400.0 + 3.0 * t);
        let visible = t < 25.0;
        if k % 2 == 0 {
            radar_seq += 1;
            let mut dets = Vec::new();
            if visible {
                let range = x.hypot(y);
                let bearing = x.atan2(y).to_degrees().rem_euclid(360.0);
                dets.push((range, bearing));
            }
            if k % 10 == 4 {
                dets.push((3000.0 + 10.0 * k as f64, (37.0 * k as f64) % 360.0));
            }
            lines.push(radar_batch(radar_seq, t0 + t, &dets).to_string());
        } else {
            camera_seq += 1;
            let dets: Vec<(f64, f64)> = if visible { vec![(x, y)] } else { vec![] };
            lines.push(camera_batch(camera_seq, t0 + t, &dets).to_string());
        }
    }
    lines.join("\n") + "\n"
}

#[test]
fn real_frames_of_a_recording_validate_and_keep_the_contract() {
    let dir = temp_dir("schema-frames");
    let config = write_file(&dir, "site.toml", &site_toml(""));
    let recording = crossing_recording();
    let batch_schema = schema("batch");
    for (i, line) in recording.lines().enumerate() {
        let v: Value = serde_json::from_str(line).unwrap();
        assert_valid(&batch_schema, &format!("recording line {}", i + 1), &v);
    }
    let (frames, stderr) = run_batch(&config, &recording, &dir);
    assert_eq!(frames.len(), recording.lines().count(), "{stderr}");
    let frame_schema = schema("frame");
    let configured = ["sound-radar", "quay-camera"];
    let mut ended_so_far: Vec<u64> = Vec::new();
    let (mut saw_confirmed, mut saw_fused) = (false, false);
    for (i, f) in frames.iter().enumerate() {
        assert_valid(&frame_schema, &format!("frame {}", i + 1), f);
        let ids: Vec<u64> = f["tracks"]
            .as_array()
            .unwrap()
            .iter()
            .map(|t| t["id"].as_u64().unwrap())
            .collect();
        assert!(
            ids.windows(2).all(|w| w[0] < w[1]),
            "ids not ascending: {f}"
        );
        let ended: Vec<u64> = f["ended"]
            .as_array()
            .unwrap()
            .iter()
            .map(|v| v.as_u64().unwrap())
            .collect();
        assert!(
            ended.windows(2).all(|w| w[0] < w[1]),
            "ended not ascending: {f}"
        );
        for id in &ended {
            assert!(!ids.contains(id), "ended track {id} still listed: {f}");
        }
        for id in &ids {
            assert!(!ended_so_far.contains(id), "track id {id} reused: {f}");
        }
        ended_so_far.extend(&ended);
        for t in f["tracks"].as_array().unwrap() {
            // The extension fields are optional in the schema but always written.
            for key in ["last_update", "existence", "sensors", "cov"] {
                assert!(t.get(key).is_some(), "track lacks {key}: {t}");
            }
            let cov: Vec<f64> = t["cov"]
                .as_array()
                .unwrap()
                .iter()
                .map(|v| v.as_f64().expect("finite covariance"))
                .collect();
            // Diagonal entries of the upper triangle, row-major: 0, 4, 7, 9.
            for d in [0, 4, 7, 9] {
                assert!(cov[d] >= 0.0, "negative variance in {t}");
            }
            let sensors: Vec<&str> = t["sensors"]
                .as_array()
                .unwrap()
                .iter()
                .map(|s| s.as_str().unwrap())
                .collect();
            assert!(sensors.iter().all(|s| configured.contains(s)), "{t}");
            saw_confirmed |= t["status"] == "confirmed";
            saw_fused |= sensors.len() == 2;
        }
    }
    // The recording must exercise what the schema describes, or the test proves little.
    assert!(saw_confirmed, "no track was ever confirmed");
    assert!(saw_fused, "no track was ever updated by both sensors");
    assert!(!ended_so_far.is_empty(), "no track ever ended");
}

#[tokio::test]
async fn live_replies_and_pictures_validate() {
    let dir = temp_dir("schema-live");
    let config = write_file(&dir, "site.toml", &site_toml("max_detections = 2"));
    let server = Server::start(
        &plotweave_bin!(),
        &["serve", "--config", config.to_str().unwrap()],
    )
    .expect("server starts");
    let (frame_schema, reply_schema) = (schema("frame"), schema("reply"));

    // The empty picture, exactly as docs/wire.md shows it.
    let r = http(&server.addr, "GET", "/v1/tracks", Some(READ_TOKEN), None)
        .await
        .unwrap();
    assert_eq!(r.status, 200);
    let empty = r.json().unwrap();
    assert_valid(&frame_schema, "the empty picture", &empty);
    assert_eq!(
        empty,
        json!({"time": null, "sensor": null, "seq": null, "tracks": [], "ended": []})
    );

    // HTTP error bodies are the reply schema's error object.
    for (path, token, status, code) in [
        ("/v1/tracks", None, 401, "unauthorized"),
        ("/v1/nowhere", Some(READ_TOKEN), 404, "not_found"),
        (
            "/v1/tracks?colour=red",
            Some(READ_TOKEN),
            400,
            "bad_request",
        ),
        ("/v1/tracks/999", Some(READ_TOKEN), 404, "not_found"),
    ] {
        let r = http(&server.addr, "GET", path, token, None).await.unwrap();
        assert_eq!(r.status, status, "{path}: {}", r.body);
        let body = r.json().unwrap();
        assert_valid(&reply_schema, path, &body);
        assert_eq!(error_code(&body), Some(code), "{path}: {body}");
        assert!(body["error"]["seq"].is_null());
    }

    let mut frames = ws_connect(&server.ws_url("/v1/frames"), Some(READ_TOKEN))
        .await
        .unwrap();
    let mut ingest = ws_connect(&server.ws_url("/v1/ingest"), Some(CAMERA_TOKEN))
        .await
        .unwrap();
    let t0 = 1_764_600_000.0;
    let mut replies = Vec::new();
    replies.push((
        send_batch(&mut ingest, &camera_batch(1, t0, &[(120.0, 480.0)]))
            .await
            .unwrap(),
        None,
    ));
    for (batch, code) in [
        // A polar field on the camera.
        (
            json!({"sensor": "quay-camera", "seq": 2, "time": t0 + 1.0,
                   "detections": [{"x": 1.0, "y": 2.0, "bearing": 3.0}]}),
            "schema",
        ),
        (camera_batch(1, t0 + 1.0, &[]), "duplicate_seq"),
        (
            json!({"sensor": "lighthouse", "seq": 1, "time": t0, "detections": []}),
            "unknown_sensor",
        ),
        (
            camera_batch(2, t0 + 1.0, &[(1.0, 1.0), (2.0, 2.0), (3.0, 3.0)]),
            "too_many_detections",
        ),
        (radar_batch(1, t0 + 1.0, &[(500.0, 14.0)]), "forbidden"),
    ] {
        let reply = send_batch(&mut ingest, &batch).await.unwrap();
        replies.push((reply, Some(code)));
    }
    send_text(&mut ingest, "{\"sensor\": ").await.unwrap();
    replies.push((
        next_json(&mut ingest).await.unwrap(),
        Some("malformed_json"),
    ));
    for (reply, code) in &replies {
        assert_valid(&reply_schema, "ingest reply", reply);
        assert_eq!(error_code(reply), *code, "{reply}");
    }
    assert_eq!(replies[0].0, json!({"ack": 1}));

    // The one accepted batch's frame, live and from /v1/tracks.
    let live = next_json(&mut frames).await.unwrap();
    assert_valid(&frame_schema, "live frame", &live);
    assert_eq!(
        (live["sensor"].as_str(), live["seq"].as_u64()),
        (Some("quay-camera"), Some(1))
    );
    let r = http(&server.addr, "GET", "/v1/tracks", Some(READ_TOKEN), None)
        .await
        .unwrap();
    let latest = r.json().unwrap();
    assert_valid(&frame_schema, "/v1/tracks", &latest);
    assert_eq!(latest, live);
}
