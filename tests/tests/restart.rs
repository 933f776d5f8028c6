//! `[server.snapshot]`: the picture survives `kill -9`. One run takes every batch without
//! interruption; another is killed with SIGKILL part-way (after a snapshot, with batches
//! recorded since), restarted on the same files, and sent the rest: both end with the very
//! same picture, byte for byte. Also: sequences continue across the restart, a runtime
//! parameter change survives it, a bad snapshot stops the start with a message naming the
//! file, and the keys are validated.

use std::path::{Path, PathBuf};
use std::time::Duration;

use plotweave_tests::*;

/// The test site with a reorder window (so scans sit in the buffer at the kill), recording
/// with fsync and snapshots every 0.2 s, all under `dir`.
fn snapshot_site(dir: &Path) -> PathBuf {
    let text = site_toml(&format!(
        "max_batches_per_second = 100000.0\n\n[server.recording]\nenabled = true\ndirectory = {:?}\nsync = \"fsync\"\nrotate_bytes = 16384\n\n[server.snapshot]\nenabled = true\npath = {:?}\ninterval = 0.2\n",
        dir.join("rec").display(),
        dir.join("state").join("picture.snapshot").display()
    ))
    .replace("reorder_window = 0.0", "reorder_window = 1.0");
    write_file(dir, "site.toml", &text)
}

/// Batch `k` (1-based) of the scripted stream: three vessels on straight courses seen by the
/// camera at every step and by the radar at every third, with a little clutter from a fixed
/// linear congruential sequence; every fourth pair of steps arrives swapped (times 0.5 s
/// apart, inside the 1 s reorder window).
fn batch(k: u64) -> (bool, serde_json::Value) {
    let slot = if k % 4 == 2 {
        k + 1
    } else if k % 4 == 3 {
        k - 1
    } else {
        k
    };
    let t = 1_764_600_000.0 + 0.5 * slot as f64;
    let s = 0.5 * slot as f64;
    let vessels = [
        (-400.0 + 3.0 * s, 300.0 + 1.0 * s),
        (200.0 - 2.0 * s, 900.0 + 2.5 * s),
        (500.0 + 0.5 * s, 1500.0 - 3.0 * s),
    ];
    let mut lcg = k
        .wrapping_mul(6364136223846793005)
        .wrapping_add(1442695040888963407);
    let mut next = || {
        lcg = lcg
            .wrapping_mul(6364136223846793005)
            .wrapping_add(1442695040888963407);
        (lcg >> 11) as f64 / (1u64 << 53) as f64
    };
    if k % 3 == 0 {
        let mut pts: Vec<(f64, f64)> = vessels
            .iter()
            .map(|&(x, y)| {
                (
                    (x * x + y * y).sqrt() + 6.0 * (next() - 0.5),
                    f64::atan2(x, y).to_degrees().rem_euclid(360.0) + 0.3 * (next() - 0.5),
                )
            })
            .collect();
        pts.push((300.0 + 4000.0 * next(), 360.0 * next()));
        (true, radar_batch(k / 3, t, &pts))
    } else {
        let mut pts: Vec<(f64, f64)> = vessels
            .iter()
            .map(|&(x, y)| (x + 3.0 * (next() - 0.5), y + 3.0 * (next() - 0.5)))
            .collect();
        if next() < 0.3 {
            pts.push((-1000.0 + 2000.0 * next(), 2000.0 * next()));
        }
        (false, camera_batch(k - k / 3, t, &pts))
    }
}

struct Sensors {
    camera: Ws,
    radar: Ws,
}

async fn connect(server: &Server) -> Sensors {
    Sensors {
        camera: ws_connect(&server.ws_url("/v1/ingest"), Some(CAMERA_TOKEN))
            .await
            .unwrap(),
        radar: ws_connect(&server.ws_url("/v1/ingest"), Some(RADAR_TOKEN))
            .await
            .unwrap(),
    }
}

/// Send batches `range`, each acknowledged before the next; the admin change at batch 40.
async fn send(server: &Server, s: &mut Sensors, range: std::ops::RangeInclusive<u64>) {
    for k in range {
        if k == 40 {
            let r = http(
                &server.addr,
                "POST",
                "/v1/admin/sensors/sound-radar",
                Some(ADMIN_TOKEN),
                Some(r#"{"clutter_rate": 3.5}"#),
            )
            .await
            .unwrap();
            assert_eq!(r.status, 200, "{}", r.body);
        }
        let (radar, b) = batch(k);
        let ws = if radar { &mut s.radar } else { &mut s.camera };
        let reply = send_batch(ws, &b).await.unwrap();
        assert_eq!(
            reply,
            serde_json::json!({"ack": b["seq"]}),
            "batch {k}: {}",
            server.stderr()
        );
    }
}

async fn picture_now(server: &Server) -> String {
    let r = http(&server.addr, "GET", "/v1/tracks", Some(READ_TOKEN), None)
        .await
        .unwrap();
    assert_eq!(r.status, 200);
    r.body
}

/// The picture once the engine has caught up: an ack means queued, not yet applied, so wait
/// for an empty engine queue and the same picture twice 100 ms apart.
async fn picture(server: &Server) -> String {
    let start = std::time::Instant::now();
    loop {
        let before = picture_now(server).await;
        let depth = metric(server, "plotweave_engine_queue_depth").await;
        tokio::time::sleep(Duration::from_millis(100)).await;
        let after = picture_now(server).await;
        if depth == 0.0 && before == after {
            return after;
        }
        assert!(start.elapsed() < WAIT, "the engine did not settle");
    }
}

async fn metric(server: &Server, name: &str) -> f64 {
    let scrape = scrape(&server.addr).await.unwrap();
    scrape
        .samples
        .iter()
        .find(|s| s.metric == name)
        .map(|s| match s.value {
            prometheus_parse::Value::Counter(v)
            | prometheus_parse::Value::Gauge(v)
            | prometheus_parse::Value::Untyped(v) => v,
            _ => f64::NAN,
        })
        .unwrap_or_else(|| panic!("{name} not in the scrape"))
}

const TOTAL: u64 = 150;
const KILL_AT: u64 = 100;

#[tokio::test]
async fn picture_after_kill_9_and_restart_equals_the_uninterrupted_run() {
    let bin = plotweave_bin!();
    // The uninterrupted run.
    let dir_a = temp_dir("restart-whole");
    let cfg_a = snapshot_site(&dir_a);
    let a = Server::start(&bin, &["serve", "--config", cfg_a.to_str().unwrap()]).unwrap();
    let mut sa = connect(&a).await;
    send(&a, &mut sa, 1..=TOTAL).await;
    let expected = picture(&a).await;
    let tracks: serde_json::Value = serde_json::from_str(&expected).unwrap();
    assert!(
        tracks["tracks"].as_array().is_some_and(|t| t
            .iter()
            .filter(|t| t["status"] == "confirmed")
            .count()
            == 3),
        "the script should end with the three vessels confirmed: {expected}"
    );

    // The interrupted run: snapshots while batches flow, then SIGKILL with batches recorded
    // after the last snapshot (the snapshot interval is 0.2 s; a pause makes sure one is due).
    let dir_b = temp_dir("restart-killed");
    let cfg_b = snapshot_site(&dir_b);
    let mut b = Server::start(&bin, &["serve", "--config", cfg_b.to_str().unwrap()]).unwrap();
    let mut sb = connect(&b).await;
    send(&b, &mut sb, 1..=60).await;
    tokio::time::sleep(Duration::from_millis(400)).await;
    send(&b, &mut sb, 61..=KILL_AT).await;
    let written = metric(&b, "plotweave_snapshots_written_total").await;
    assert!(written >= 2.0, "snapshots written: {written}");
    b.sigkill().unwrap();
    drop(sb);

    let b2 = Server::start(&bin, &["serve", "--config", cfg_b.to_str().unwrap()]).unwrap();
    let replayed = metric(&b2, "plotweave_snapshot_restored_batches").await;
    assert!(
        replayed >= 1.0 && replayed < KILL_AT as f64,
        "batches after the last snapshot come from the recording: {replayed}\n{}",
        b2.stderr()
    );
    // Sequences continue: the next batch of each sensor is accepted, a repeat is refused.
    let mut sb2 = connect(&b2).await;
    let (_, last) = batch(KILL_AT);
    let reply = send_batch(&mut sb2.camera, &last).await.unwrap();
    assert_eq!(error_code(&reply), Some("duplicate_seq"), "{reply}");
    // The runtime change made before the kill is still in force.
    let sensors = http(&b2.addr, "GET", "/v1/sensors", Some(READ_TOKEN), None)
        .await
        .unwrap()
        .json()
        .unwrap();
    let radar = sensors["sensors"]
        .as_array()
        .unwrap()
        .iter()
        .find(|s| s["id"] == "sound-radar")
        .unwrap()
        .clone();
    assert_eq!(radar["clutter_rate"], 3.5, "{radar}");
    send(&b2, &mut sb2, KILL_AT + 1..=TOTAL).await;
    let got = picture(&b2).await;
    assert_eq!(
        got, expected,
        "restored run differs from the uninterrupted one"
    );
}

#[tokio::test]
async fn a_damaged_snapshot_stops_the_start_naming_the_file() {
    let dir = temp_dir("restart-bad");
    let cfg = snapshot_site(&dir);
    std::fs::create_dir_all(dir.join("state")).unwrap();
    std::fs::write(
        dir.join("state").join("picture.snapshot"),
        b"\xa1\x01garbage",
    )
    .unwrap();
    let (status, _out, err) = run_to_end(
        &plotweave_bin!(),
        &["serve", "--config", cfg.to_str().unwrap()],
    )
    .unwrap();
    assert!(!status.success());
    assert!(
        err.contains("picture.snapshot") && err.contains("move the file away"),
        "{err}"
    );
}

#[test]
fn snapshot_keys_are_validated() {
    let dir = temp_dir("restart-keys");
    let cfg = write_file(
        &dir,
        "site.toml",
        &site_toml("\n[server.snapshot]\nenabled = true\ninterval = -1.0\n"),
    );
    let (status, out, err) = run_to_end(
        &plotweave_bin!(),
        &["check", "--config", cfg.to_str().unwrap()],
    )
    .unwrap();
    let text = format!("{}{err}", String::from_utf8_lossy(&out));
    assert!(!status.success());
    for needle in [
        "server.snapshot.interval",
        "server.snapshot.path",
        "server.snapshot.enabled",
        "[server.recording]",
    ] {
        assert!(text.contains(needle), "{needle} missing in: {text}");
    }
}
