//! A bounded load test of the real binary over real sockets: 8 sensors, each with its own
//! token and connection, send batches with clutter as fast as acknowledgements allow while 3
//! fast and (in the second phase) 3 deliberately slow frame subscribers listen. It proves that
//! every acknowledged batch was processed (an exact account of seqs and counters), that the
//! slow consumers were told they skipped frames instead of holding ingest back, and that the
//! server's peak memory stayed bounded. The driver is `plotweave_tests::load` (also behind
//! `loadgen --slow-subscribers`, which gives the release-build figures).

use std::time::Duration;

use plotweave_tests::load::{LoadSpec, quantile, run};
use plotweave_tests::plotweave_bin;

/// Peak resident memory the server may reach in this run (debug build), MiB. Measured: 25–40
/// MiB; frames held per slow subscriber instead of shared and dropped (a leak or a copy per
/// consumer) would grow with the run's ~10 000 frames of several KiB each.
const PEAK_RSS_BOUND_MIB: f64 = 96.0;

/// The loaded phase's ingest rate must be at least this fraction of the baseline's. A
/// consumer that blocked the engine would hold ingest to its own read rate (here at most
/// 1 / 40 ms = 25 frames/s, against hundreds of batches/s without it); a quarter leaves room
/// for a noisy shared 2-core machine.
const MIN_LOADED_RATE_RATIO: f64 = 0.25;

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn slow_frame_consumers_skip_while_every_acked_batch_is_processed() {
    let spec = LoadSpec {
        sensors: 8,
        detections: 24,
        objects: 3,
        window: 4,
        fast_subscribers: 3,
        slow_subscribers: 3,
        slow_read: Duration::from_millis(40),
        slow_recv_buffer: 4096,
        baseline_seconds: 3.0,
        loaded_seconds: 4.0,
        // Batches are stamped by their senders, and on a starved debug run one can reach the
        // server well after a later-stamped one from another connection; a late_scan refusal
        // would fail the test, so the window is generous (a longer one defers so much tracker
        // work to the end of a phase that the run gets slow).
        reorder_window: 1.0,
        // Slack for a fast subscriber starved of CPU for a moment (debug build, shared
        // machine); the slow ones fall thousands of frames behind in the loaded phase.
        frame_buffer: 512,
        queue_depth: 64,
    };
    let report = run(&plotweave_bin!(), &spec).await.unwrap();
    let summary = report.summary(&spec);
    println!("{summary}");

    // Every batch acknowledged, and the account exact (seqs, frames, counters, skips).
    assert!(report.rejections.is_empty(), "{summary}");
    assert!(report.mismatches.is_empty(), "{summary}");
    assert!(
        report.baseline.acked > 0 && report.loaded.acked > 0,
        "{summary}"
    );

    // The slow subscribers lagged, and were told so with skip markers.
    let slow: Vec<_> = report.subscribers.iter().filter(|s| s.slow).collect();
    assert_eq!(slow.len(), 3);
    for s in &slow {
        assert!(s.markers > 0 && s.skipped > 0, "{summary}");
    }
    // ... while ingest kept its pace (a count of acks over the phase's own duration).
    let ratio = report.loaded.rate() / report.baseline.rate();
    assert!(
        ratio >= MIN_LOADED_RATE_RATIO,
        "ratio {ratio:.2}: {summary}"
    );
    // The comparison can tell a blocked engine from a free one only if the baseline is well
    // above what a slow subscriber reads.
    let slow_rate = 1.0 / spec.slow_read.as_secs_f64();
    assert!(
        report.baseline.rate() > 4.0 * slow_rate,
        "baseline too slow to tell: {summary}"
    );
    assert!(!quantile(&report.loaded.ack_latency_ms, 0.99).is_nan());

    let peak = report.peak_rss_kib.expect("VmHWM of the server") as f64 / 1024.0;
    assert!(
        peak < PEAK_RSS_BOUND_MIB,
        "peak RSS {peak:.1} MiB: {summary}"
    );
}
