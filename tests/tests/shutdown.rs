//! Graceful shutdown on SIGTERM with batches in flight: every acknowledged batch appears in a
//! frame, the subscriber is closed cleanly, the process exits 0 within its bound.

use std::collections::BTreeSet;
use std::time::Duration;

use futures_util::{SinkExt, StreamExt};
use plotweave_tests::*;
use tokio_tungstenite::tungstenite::Message;

#[tokio::test]
async fn sigterm_drains_in_flight_batches_and_exits_zero() {
    let dir = temp_dir("shutdown");
    let cfg = write_file(
        &dir,
        "site.toml",
        &site_toml("queue_depth = 4\nmax_batches_per_second = 100000.0"),
    );
    let mut server = Server::start(
        &plotweave_bin!(),
        &["serve", "--config", cfg.to_str().unwrap()],
    )
    .unwrap();
    let mut frames = ws_connect(&server.ws_url("/v1/frames"), Some(READ_TOKEN))
        .await
        .unwrap();
    let ws = ws_connect(&server.ws_url("/v1/ingest"), Some(CAMERA_TOKEN))
        .await
        .unwrap();
    let (mut tx, mut rx) = ws.split();
    let n = 200u64;
    // Pipeline the batches without waiting for replies, then stop the server mid-stream.
    let sender = tokio::spawn(async move {
        for k in 1..=n {
            let b = camera_batch(
                k,
                1_764_600_000.0 + k as f64 * 0.1,
                &[(10.0 + k as f64, 900.0)],
            );
            if tx.send(Message::text(b.to_string())).await.is_err() {
                break;
            }
        }
        tx
    });
    // Wait for a first ack so that some batches are surely in flight, then SIGTERM.
    let mut acked = BTreeSet::new();
    let first = tokio::time::timeout(WAIT, rx.next())
        .await
        .unwrap()
        .unwrap()
        .unwrap();
    let v: serde_json::Value = serde_json::from_str(first.to_text().unwrap()).unwrap();
    acked.insert(v["ack"].as_u64().expect("first reply is an ack"));
    server.sigterm().unwrap();
    let mut close_code = None;
    while let Ok(Some(m)) = tokio::time::timeout(WAIT, rx.next()).await {
        match m {
            Ok(Message::Text(t)) => {
                let v: serde_json::Value = serde_json::from_str(t.as_str()).unwrap();
                match v["ack"].as_u64() {
                    Some(seq) => {
                        acked.insert(seq);
                    }
                    None => assert_eq!(v["error"]["code"], "shutting_down", "{v}"),
                }
            }
            Ok(Message::Close(f)) => {
                close_code = f.map(|f| u16::from(f.code));
                // Keep polling so the close reply goes out, until the stream ends.
                while let Ok(Some(Ok(_))) = tokio::time::timeout(WAIT, rx.next()).await {}
                break;
            }
            Ok(_) => {}
            Err(_) => break,
        }
    }
    drop(sender);
    assert_eq!(close_code, Some(1001), "ingest is closed with 'going away'");
    let mut framed = BTreeSet::new();
    loop {
        match next(&mut frames).await.unwrap() {
            Incoming::Json(f) => {
                framed.insert(f["seq"].as_u64().unwrap());
            }
            Incoming::Close(code) => {
                assert_eq!(code, Some(1001));
                while !matches!(next(&mut frames).await, Ok(Incoming::End) | Err(_)) {}
                break;
            }
            Incoming::End => panic!("frames ended without a close frame"),
        }
    }
    let missing: Vec<_> = acked.difference(&framed).collect();
    assert!(missing.is_empty(), "acked but never framed: {missing:?}");
    assert!(!acked.is_empty());
    let status = server.wait_exit(Duration::from_secs(15)).unwrap();
    assert!(status.success(), "exit {status:?}\n{}", server.stderr());
    assert!(
        server.stderr().contains("shutdown complete"),
        "{}",
        server.stderr()
    );
}
