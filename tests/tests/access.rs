//! The access matrix, end to end against the real binary: every protected path of the HTTP
//! surface (docs/wire.md, service/src/http.rs) tried with no token, malformed credentials, a
//! token that is no one's, every role's token; each answer checked against the error-code
//! table of docs/wire.md (`unauthorized` 401: no valid token; `forbidden` 403: a valid token
//! that does not allow this) and docs/security.md (which token opens which path); every
//! refusal counted exactly once in `plotweave_auth_refusals_total{endpoint, reason}`; and no
//! token ever written to standard output, standard error (trace level, JSON and text log
//! formats) or `/metrics`.

use std::collections::BTreeMap;

use plotweave_tests::*;
use serde_json::json;

/// A well-formed token that is no one's.
const WRONG_TOKEN: &str = "wrong-token-7a7a7a7a7a";

/// What a request presents.
#[derive(Debug, Clone, Copy)]
enum Cred {
    /// Nothing.
    Nothing,
    /// `Authorization: Token READ_TOKEN` (a real token under the wrong scheme).
    WrongScheme,
    /// `Authorization: Bearer` with nothing after it.
    EmptyBearer,
    /// The bearer subprotocol with digits that are not hexadecimal (WebSocket read paths).
    BadSubprotocol,
    /// `Bearer WRONG_TOKEN`.
    Wrong,
    Radar,
    Camera,
    Read,
    Admin,
    /// The read token as the `plotweave.bearer.HEX` subprotocol (how the page sends it).
    ReadSubprotocol,
}

impl Cred {
    fn headers(self) -> Vec<(&'static str, String)> {
        let bearer = |t: &str| vec![("Authorization", format!("Bearer {t}"))];
        match self {
            Cred::Nothing => vec![],
            Cred::WrongScheme => vec![("Authorization", format!("Token {READ_TOKEN}"))],
            Cred::EmptyBearer => vec![("Authorization", "Bearer".to_string())],
            Cred::BadSubprotocol => vec![(
                "Sec-WebSocket-Protocol",
                "plotweave.v1, plotweave.bearer.zz".to_string(),
            )],
            Cred::Wrong => bearer(WRONG_TOKEN),
            Cred::Radar => bearer(RADAR_TOKEN),
            Cred::Camera => bearer(CAMERA_TOKEN),
            Cred::Read => bearer(READ_TOKEN),
            Cred::Admin => bearer(ADMIN_TOKEN),
            Cred::ReadSubprotocol => vec![(
                "Sec-WebSocket-Protocol",
                format!("plotweave.v1, plotweave.bearer.{}", hex(READ_TOKEN)),
            )],
        }
    }
}

fn hex(s: &str) -> String {
    s.bytes().map(|b| format!("{b:02x}")).collect()
}

/// Expected outcome: `Ok(status)` of an accepted request, or the refusal's status, code and
/// metric reason.
type Expect = Result<u16, (u16, &'static str, &'static str)>;

const MISSING: Expect = Err((401, "unauthorized", "missing_token"));
const MALFORMED: Expect = Err((401, "unauthorized", "malformed"));
const UNKNOWN: Expect = Err((401, "unauthorized", "unknown_token"));
const WRONG_ROLE: Expect = Err((403, "forbidden", "wrong_role"));

/// Refusals made so far, per (endpoint, reason): what the metric must show.
type Counts = BTreeMap<(String, String), u64>;

fn count(counts: &mut Counts, endpoint: &str, expect: Expect) {
    if let Err((_, _, reason)) = expect {
        *counts
            .entry((endpoint.to_string(), reason.to_string()))
            .or_default() += 1;
    }
}

/// One plain HTTP request with `cred`; check the answer against `expect`.
async fn check_http(
    server: &Server,
    counts: &mut Counts,
    (endpoint, method, path, body): (&str, &str, &str, Option<&str>),
    cred: Cred,
    expect: Expect,
) {
    let headers = cred.headers();
    let h: Vec<(&str, &str)> = headers.iter().map(|(n, v)| (*n, v.as_str())).collect();
    let r = http_with(&server.addr, method, path, &h, body)
        .await
        .unwrap();
    let what = format!("{method} {path} with {cred:?}");
    match expect {
        Ok(status) => assert_eq!(r.status, status, "{what}: {}", r.body),
        Err((status, code, _)) => {
            assert_eq!(r.status, status, "{what}: {}", r.body);
            let v = r.json().unwrap();
            assert_eq!(error_code(&v), Some(code), "{what}: {v}");
            assert_eq!(v["error"]["seq"], serde_json::Value::Null, "{what}");
            assert!(
                v["error"]["message"]
                    .as_str()
                    .is_some_and(|m| !m.is_empty()),
                "{what}: {v}"
            );
        }
    }
    count(counts, endpoint, expect);
}

/// One WebSocket upgrade with `cred`; on success the connection is returned.
async fn check_ws(
    server: &Server,
    counts: &mut Counts,
    (endpoint, path): (&str, &str),
    cred: Cred,
    expect: Expect,
) -> Option<Ws> {
    let headers = cred.headers();
    let h: Vec<(&str, &str)> = headers.iter().map(|(n, v)| (*n, v.as_str())).collect();
    let got = ws_connect_with(&server.ws_url(path), &h).await;
    let what = format!("upgrade of {path} with {cred:?}");
    count(counts, endpoint, expect);
    match (expect, got) {
        (Ok(_), Ok(ws)) => Some(ws),
        (Ok(_), Err(e)) => panic!("{what}: refused: {e}"),
        (Err((status, code, _)), Err(e)) => {
            let e = e.to_string();
            assert!(
                e.starts_with(&format!("HTTP {status} ")) && e.contains(&format!("\"{code}\"")),
                "{what}: expected {status} {code}, got {e}"
            );
            None
        }
        (Err(_), Ok(_)) => panic!("{what}: accepted, expected {expect:?}"),
    }
}

/// The whole matrix against a running server (tokens of `site_toml`); returns the expected
/// refusal counts.
async fn matrix(server: &Server) -> Counts {
    use Cred::*;
    let mut counts = Counts::new();
    let t0 = 1_764_600_000.0;

    // Read paths over plain HTTP. `/v1/tracks/999999` is not live: a request that passes
    // authorisation gets 404 there.
    let reads = [
        ("tracks", "GET", "/v1/tracks", None),
        ("track", "GET", "/v1/tracks/999999", None),
        ("sensors", "GET", "/v1/sensors", None),
    ];
    for target in reads {
        let ok = if target.0 == "track" { 404 } else { 200 };
        for (cred, expect) in [
            (Nothing, MISSING),
            (WrongScheme, MALFORMED),
            (EmptyBearer, MALFORMED),
            (Wrong, UNKNOWN),
            (Radar, WRONG_ROLE),
            (Camera, WRONG_ROLE),
            (Read, Ok(ok)),
            (Admin, Ok(ok)),
        ] {
            check_http(server, &mut counts, target, cred, expect).await;
        }
    }

    // Admin: a real parameter change, so that the success path (and its log line) runs too.
    let admin = (
        "admin",
        "POST",
        "/v1/admin/sensors/sound-radar",
        Some(r#"{"clutter_rate": 2.5}"#),
    );
    for (cred, expect) in [
        (Nothing, MISSING),
        (WrongScheme, MALFORMED),
        (EmptyBearer, MALFORMED),
        (Wrong, UNKNOWN),
        (Radar, WRONG_ROLE),
        (Camera, WRONG_ROLE),
        (Read, WRONG_ROLE),
        (Admin, Ok(200)),
    ] {
        check_http(server, &mut counts, admin, cred, expect).await;
    }

    // Open paths: any credential (or none) passes and nothing is counted.
    for path in ["/metrics", "/healthz", "/readyz", "/"] {
        for cred in [Nothing, WrongScheme, Wrong, Radar] {
            check_http(
                server,
                &mut counts,
                ("open", "GET", path, None),
                cred,
                Ok(200),
            )
            .await;
        }
    }

    // WebSocket read paths; the bearer subprotocol is the browser's way to present the token.
    for target in [("frames", "/v1/frames"), ("detections", "/v1/detections")] {
        for (cred, expect) in [
            (Nothing, MISSING),
            (WrongScheme, MALFORMED),
            (EmptyBearer, MALFORMED),
            (BadSubprotocol, MALFORMED),
            (Wrong, UNKNOWN),
            (Radar, WRONG_ROLE),
            (Camera, WRONG_ROLE),
            (Read, Ok(101)),
            (Admin, Ok(101)),
            (ReadSubprotocol, Ok(101)),
        ] {
            if let Some(mut ws) = check_ws(server, &mut counts, target, cred, expect).await {
                ws.close(None).await.unwrap();
            }
        }
    }

    // Ingest: every sensor has a token here, so a connection without one is refused at the
    // upgrade; the read and admin tokens are valid but not for ingest.
    let ingest = ("ingest", "/v1/ingest");
    for (cred, expect) in [
        (Nothing, MISSING),
        (WrongScheme, MALFORMED),
        (EmptyBearer, MALFORMED),
        (Wrong, UNKNOWN),
        (Read, WRONG_ROLE),
        (Admin, WRONG_ROLE),
    ] {
        assert!(
            check_ws(server, &mut counts, ingest, cred, expect)
                .await
                .is_none()
        );
    }
    // Each sensor's token sends for that sensor, and a batch sent as the other sensor is
    // refused `forbidden` (counted as `wrong_sensor`) while the connection stays open.
    for (cred, own, other) in [
        (
            Radar,
            radar_batch(1, t0 + 1.0, &[(900.0, 30.0)]),
            camera_batch(1, t0 + 1.0, &[(50.0, 900.0)]),
        ),
        (
            Camera,
            camera_batch(1, t0 + 1.5, &[(50.0, 900.0)]),
            radar_batch(1, t0 + 1.5, &[(900.0, 30.0)]),
        ),
    ] {
        let mut ws = check_ws(server, &mut counts, ingest, cred, Ok(101))
            .await
            .unwrap();
        let reply = send_batch(&mut ws, &other).await.unwrap();
        assert_eq!(error_code(&reply), Some("forbidden"), "{cred:?}: {reply}");
        assert_eq!(reply["error"]["seq"], 1);
        count(
            &mut counts,
            "ingest",
            Err((403, "forbidden", "wrong_sensor")),
        );
        let reply = send_batch(&mut ws, &own).await.unwrap();
        assert_eq!(reply, json!({"ack": 1}), "{cred:?}");
        ws.close(None).await.unwrap();
    }
    counts
}

/// Every series of `plotweave_auth_refusals_total` equals the refusals made (0 for the rest),
/// and every (endpoint, reason) that can happen is exposed.
fn assert_refusals_counted(s: &prometheus_parse::Scrape, counts: &Counts) {
    let mut exposed = Counts::new();
    for x in s
        .samples
        .iter()
        .filter(|x| x.metric == "plotweave_auth_refusals_total")
    {
        let v = match x.value {
            prometheus_parse::Value::Counter(v) => v,
            ref other => panic!("not a counter: {other:?}"),
        };
        let key = (
            x.labels.get("endpoint").unwrap().to_string(),
            x.labels.get("reason").unwrap().to_string(),
        );
        assert!(exposed.insert(key, v as u64).is_none());
    }
    // 7 protected endpoints × 4 reasons, plus wrong_sensor on ingest.
    assert_eq!(exposed.len(), 7 * 4 + 1, "{exposed:#?}");
    for (key, v) in &exposed {
        assert_eq!(
            *v,
            counts.get(key).copied().unwrap_or(0),
            "plotweave_auth_refusals_total{key:?}"
        );
    }
    for key in counts.keys() {
        assert!(exposed.contains_key(key), "{key:?} made but not exposed");
    }
}

/// Run the matrix on a server logging at trace level in `log_format`, then check the counts
/// and that no token appears in anything the process wrote or exposed.
async fn matrix_counted_and_no_token_leaks(log_format: &str) {
    let dir = temp_dir("access");
    let cfg = write_file(&dir, "site.toml", &site_toml(""));
    let mut server = Server::start_with_env(
        &plotweave_bin!(),
        &[
            "serve",
            "--config",
            cfg.to_str().unwrap(),
            "--log-format",
            log_format,
        ],
        &[("RUST_LOG", "trace")],
    )
    .unwrap();
    let counts = matrix(&server).await;
    let total: u64 = counts.values().sum();
    // 3 read paths × 6 refusals, admin 7, 2 WebSocket read paths × 7, ingest 6 + 2 batches.
    assert_eq!(total, 3 * 6 + 7 + 2 * 7 + 6 + 2, "{counts:#?}");

    let s = scrape(&server.addr).await.unwrap();
    assert_refusals_counted(&s, &counts);
    // The admin change went through (the success path really ran).
    assert_eq!(
        sample(
            &s,
            "plotweave_sensor_param_changes_total",
            &[("sensor", "sound-radar")]
        ),
        Some(1.0)
    );
    let metrics_body = http(&server.addr, "GET", "/metrics", None, None)
        .await
        .unwrap()
        .body;

    server.sigterm().unwrap();
    let st = server.wait_exit(WAIT).unwrap();
    assert!(st.success(), "{st:?}");
    let (out, err) = (server.stdout(), server.stderr());
    // The logs really are at trace level and in the asked format: refusals are logged at
    // debug, and the admin change at info.
    assert!(err.contains("authorisation refused"), "{err}");
    assert!(err.contains("sensor parameters changed by admin"));
    assert!(
        err.lines()
            .any(|l| l.contains("TRACE") || l.contains("\"TRACE\""))
    );
    if log_format == "json" {
        for line in err.lines().filter(|l| !l.is_empty()) {
            assert!(
                serde_json::from_str::<serde_json::Value>(line).is_ok(),
                "not a JSON log line: {line}"
            );
        }
    }
    for (what, text) in [
        ("stdout", &out),
        ("stderr", &err),
        ("/metrics", &metrics_body),
    ] {
        for token in [
            RADAR_TOKEN,
            CAMERA_TOKEN,
            READ_TOKEN,
            ADMIN_TOKEN,
            WRONG_TOKEN,
            &hex(READ_TOKEN),
        ] {
            if let Some(at) = text.find(token) {
                let from = text[..at].rfind('\n').map_or(0, |i| i + 1);
                let to = text[at..].find('\n').map_or(text.len(), |i| at + i);
                panic!("a token in {what} ({log_format} logs): {}", &text[from..to]);
            }
        }
    }
}

#[tokio::test]
async fn access_matrix_with_json_logs_at_trace_level() {
    matrix_counted_and_no_token_leaks("json").await;
}

#[tokio::test]
async fn access_matrix_with_text_logs_at_trace_level() {
    matrix_counted_and_no_token_leaks("text").await;
}

/// Where a sensor has no token, connections without one are accepted, but a batch for a
/// sensor that has a token is refused `unauthorized` on such a connection, and counted.
#[tokio::test]
async fn an_anonymous_batch_for_a_sensor_with_a_token_is_refused_and_counted() {
    let dir = temp_dir("access-anon");
    let toml = site_toml("").replace(&format!("token = \"{CAMERA_TOKEN}\"\n"), "");
    assert!(!toml.contains(CAMERA_TOKEN));
    let cfg = write_file(&dir, "site.toml", &toml);
    let server = Server::start(
        &plotweave_bin!(),
        &["serve", "--config", cfg.to_str().unwrap()],
    )
    .unwrap();
    let mut ws = ws_connect(&server.ws_url("/v1/ingest"), None)
        .await
        .unwrap();
    let t0 = 1_764_600_000.0;
    let reply = send_batch(&mut ws, &radar_batch(1, t0, &[])).await.unwrap();
    assert_eq!(error_code(&reply), Some("unauthorized"), "{reply}");
    assert!(
        reply["error"]["message"]
            .as_str()
            .unwrap()
            .contains("requires its token"),
        "{reply}"
    );
    let reply = send_batch(&mut ws, &camera_batch(1, t0, &[]))
        .await
        .unwrap();
    assert_eq!(reply, json!({"ack": 1}));
    // The camera's batches may come from anyone, the radar's still need the radar's token.
    let mut radar = ws_connect(&server.ws_url("/v1/ingest"), Some(RADAR_TOKEN))
        .await
        .unwrap();
    let reply = send_batch(&mut radar, &radar_batch(1, t0 + 1.0, &[]))
        .await
        .unwrap();
    assert_eq!(reply, json!({"ack": 1}));

    let s = scrape(&server.addr).await.unwrap();
    let refusals = |reason: &str| {
        sample(
            &s,
            "plotweave_auth_refusals_total",
            &[("endpoint", "ingest"), ("reason", reason)],
        )
    };
    assert_eq!(refusals("missing_token"), Some(1.0));
    assert_eq!(refusals("wrong_sensor"), Some(0.0));
    assert_eq!(
        sample(
            &s,
            "plotweave_batches_rejected_total",
            &[("sensor", "sound-radar"), ("reason", "unauthorized")]
        ),
        Some(1.0)
    );
}
