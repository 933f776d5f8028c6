//! `plotweave demo` serves the embedded site fed live by the simulator; an open site is not
//! served on a public address without `--allow-open`.

use std::time::Duration;

use plotweave_tests::*;

#[tokio::test]
async fn demo_streams_frames_of_both_sensors_and_stops_on_sigterm() {
    let mut server = Server::start(&plotweave_bin!(), &["demo"]).unwrap();
    let mut frames = ws_connect(&server.ws_url("/v1/frames"), None)
        .await
        .unwrap();
    let mut sensors = std::collections::BTreeSet::new();
    // The camera scans every 1 s and the radar every 2.5 s, so both appear within ~3 s.
    while sensors.len() < 2 {
        let f = next_json(&mut frames).await.unwrap();
        assert!(f["tracks"].is_array() && f["seq"].is_u64(), "{f}");
        sensors.insert(f["sensor"].as_str().unwrap().to_string());
    }
    assert_eq!(
        sensors.into_iter().collect::<Vec<_>>(),
        ["kestrel-radar", "north-mole-camera"]
    );
    let r = http(&server.addr, "GET", "/v1/sensors", None, None)
        .await
        .unwrap();
    assert_eq!(r.json().unwrap()["site"], "Kestrel Bay");
    assert_eq!(
        http(&server.addr, "GET", "/readyz", None, None)
            .await
            .unwrap()
            .status,
        200
    );
    server.sigterm().unwrap();
    let status = server.wait_exit(Duration::from_secs(15)).unwrap();
    assert!(status.success(), "{}", server.stderr());
}

#[test]
fn an_open_site_is_refused_on_a_public_address() {
    let (st, _, stderr) =
        run_to_end(&plotweave_bin!(), &["demo", "--listen", "0.0.0.0:0"]).unwrap();
    assert_eq!(st.code(), Some(1));
    assert!(
        stderr.contains("refusing to listen on 0.0.0.0:0"),
        "{stderr}"
    );
    assert!(stderr.contains("--allow-open"), "{stderr}");
}

/// Regression: the demo feeder's scans were acknowledged and tracked but never counted in
/// `plotweave_batches_received_total`, so `acked / received` read as infinite on the demo.
/// They now count like batches that arrive over ingest.
#[tokio::test]
async fn demo_scans_count_as_received_batches() {
    let server = Server::start(&plotweave_bin!(), &["demo"]).unwrap();
    let mut frames = ws_connect(&server.ws_url("/v1/frames"), None)
        .await
        .unwrap();
    let mut seen = std::collections::BTreeMap::<String, u64>::new();
    while seen.len() < 2 {
        let f = next_json(&mut frames).await.unwrap();
        *seen
            .entry(f["sensor"].as_str().unwrap().to_string())
            .or_default() += 1;
    }
    let m = scrape(&server.addr).await.unwrap();
    for id in ["kestrel-radar", "north-mole-camera"] {
        let l = [("sensor", id)];
        let received = sample(&m, "plotweave_batches_received_total", &l).unwrap();
        let acked = sample(&m, "plotweave_batches_acked_total", &l).unwrap();
        let rejected: f64 = m
            .samples
            .iter()
            .filter(|s| {
                s.metric == "plotweave_batches_rejected_total" && s.labels.get("sensor") == Some(id)
            })
            .filter_map(|s| match s.value {
                prometheus_parse::Value::Counter(v) => Some(v),
                _ => None,
            })
            .sum();
        assert!(
            acked >= seen[id] as f64,
            "{id}: {acked} acked, frames {seen:?}"
        );
        // A scrape may fall between the feeder's count of one scan and that scan's ack.
        assert!(
            received == acked + rejected || received == acked + rejected + 1.0,
            "{id}: received {received}, acked {acked}, rejected {rejected}"
        );
    }
}
