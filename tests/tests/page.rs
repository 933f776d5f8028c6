//! The live situation page (`GET /`) in a real headless Chromium, driven over the DevTools
//! protocol (a small client over tokio-tungstenite below: the page needs only `Target`,
//! `Page`, `Runtime`, `Input` and `Emulation` calls, so no browser-automation crate is pulled
//! in).
//!
//! Chromium is Debian's `chromium` at `/usr/bin/chromium` (`apt-get install -y chromium`).
//! Without it the tests print why and pass, **except in CI** (`CI` set), where a missing
//! browser is a failure.

use std::path::{Path, PathBuf};
use std::process::{Child, Command, Stdio};
use std::time::{Duration, Instant};

use anyhow::{Context, Result, anyhow, bail};
use base64::Engine as _;
use futures_util::{SinkExt, StreamExt};
use plotweave_tests::*;
use serde_json::{Value, json};
use tokio_tungstenite::tungstenite::Message;
use tokio_tungstenite::tungstenite::client::IntoClientRequest;

const CHROMIUM: &str = "/usr/bin/chromium";

/// How long the page may take to confirm the demo's vessels (they confirm within ~10 s of
/// the demo's start on this machine; the rest is slack for a loaded machine).
const CONFIRM_WITHIN: Duration = Duration::from_secs(30);

/// Browser sessions run one at a time (the machine has two cores).
static BROWSER: tokio::sync::Mutex<()> = tokio::sync::Mutex::const_new(());

/// The browser, or `None` (after saying why) when the test is to be skipped.
fn chromium_or_skip(test: &str) -> Option<PathBuf> {
    let p = PathBuf::from(CHROMIUM);
    if p.exists() {
        return Some(p);
    }
    if std::env::var_os("CI").is_some() {
        panic!("{test}: {CHROMIUM} is missing; CI must install it: apt-get install -y chromium");
    }
    println!(
        "SKIPPED {test}: {CHROMIUM} is not installed (apt-get install -y chromium); in CI this fails"
    );
    None
}

/// The number of demo vessels inside some sensor's coverage during the first `window` s of
/// the demo, from the demo scenario itself (`plotweave::demo::scenario`). Fails if a vessel
/// enters or leaves coverage within the window (the expectation would then be ambiguous).
fn demo_vessels_in_coverage(window: f64) -> Result<usize> {
    let site = plotweave::config::Site::demo(|_| None)?;
    let scenario = plotweave::demo::scenario(&site, 0.0)?;
    let mut count = 0;
    for target in &scenario.targets {
        let inside: Vec<bool> = (0..=window as usize)
            .map(|t| {
                filter_core::sim::target_state(target, t as f64)
                    .is_some_and(|s| site.sensors.iter().any(|c| c.covers(s[0], s[1])))
            })
            .collect();
        if inside.iter().any(|&b| b != inside[0]) {
            bail!(
                "demo vessel {:?} enters or leaves coverage within the first {window} s",
                target.name
            );
        }
        count += usize::from(inside[0]);
    }
    Ok(count)
}

/// A headless Chromium with a fresh profile; killed and removed on drop.
struct Browser {
    child: Child,
    profile: PathBuf,
}

impl Drop for Browser {
    fn drop(&mut self) {
        let _ = self.child.kill();
        let _ = self.child.wait();
        let _ = std::fs::remove_dir_all(&self.profile);
    }
}

/// Start Chromium and return it with the WebSocket address of its DevTools endpoint.
fn launch(bin: &Path) -> Result<(Browser, String)> {
    let profile = temp_dir("chromium-profile");
    let child = Command::new(bin)
        .args([
            "--headless",
            "--no-sandbox",
            "--disable-gpu",
            "--disable-quic",
            "--no-first-run",
            "--disable-background-networking",
            "--disable-component-update",
            "--disable-sync",
            "--hide-scrollbars",
            "--remote-debugging-address=127.0.0.1",
            "--remote-debugging-port=0",
            "--window-size=1400,900",
        ])
        .arg(format!("--user-data-dir={}", profile.display()))
        .arg("about:blank")
        .stdin(Stdio::null())
        .stdout(Stdio::null())
        .stderr(Stdio::null())
        .spawn()
        .with_context(|| format!("cannot start {}", bin.display()))?;
    let browser = Browser { child, profile };
    // Chromium writes the port it chose and the browser endpoint's path to this file.
    let port_file = browser.profile.join("DevToolsActivePort");
    let start = Instant::now();
    loop {
        if let Ok(text) = std::fs::read_to_string(&port_file)
            && let [port, path, ..] = text.lines().collect::<Vec<_>>()[..]
        {
            return Ok((browser, format!("ws://127.0.0.1:{port}{path}")));
        }
        if start.elapsed() > WAIT * 3 {
            bail!("Chromium wrote no {} in time", port_file.display());
        }
        std::thread::sleep(Duration::from_millis(50));
    }
}

/// A DevTools protocol connection to the browser, with one attached page session.
struct Cdp {
    ws: Ws,
    next_id: u64,
    session: Option<String>,
}

impl Cdp {
    async fn connect(url: &str) -> Result<Cdp> {
        let mut cdp = Cdp {
            ws: ws_connect(url, None).await?,
            next_id: 1,
            session: None,
        };
        let target = cdp
            .call("Target.createTarget", json!({"url": "about:blank"}))
            .await?;
        let target_id = target["targetId"].as_str().context("no targetId")?;
        let attached = cdp
            .call(
                "Target.attachToTarget",
                json!({"targetId": target_id, "flatten": true}),
            )
            .await?;
        cdp.session = Some(
            attached["sessionId"]
                .as_str()
                .context("no sessionId")?
                .to_string(),
        );
        Ok(cdp)
    }

    /// Call `method` (on the page session once attached) and return its result.
    async fn call(&mut self, method: &str, params: Value) -> Result<Value> {
        let id = self.next_id;
        self.next_id += 1;
        let mut msg = json!({"id": id, "method": method, "params": params});
        if let Some(s) = &self.session {
            msg["sessionId"] = json!(s);
        }
        self.ws.send(Message::text(msg.to_string())).await?;
        let deadline = Instant::now() + WAIT * 2;
        loop {
            let left = deadline.saturating_duration_since(Instant::now());
            let m = tokio::time::timeout(left, self.ws.next())
                .await
                .map_err(|_| anyhow!("{method}: no answer from Chromium"))?
                .ok_or_else(|| anyhow!("{method}: Chromium closed the connection"))??;
            let Message::Text(t) = m else { continue };
            let v: Value = serde_json::from_str(t.as_str())?;
            if v["id"] == json!(id) {
                if let Some(e) = v.get("error") {
                    bail!("{method}: {e}");
                }
                return Ok(v["result"].clone());
            }
            // Events and answers of other calls are not needed here.
        }
    }

    /// Evaluate `expr` in the page and return its (JSON-able) value.
    async fn eval(&mut self, expr: &str) -> Result<Value> {
        let r = self
            .call(
                "Runtime.evaluate",
                json!({"expression": expr, "returnByValue": true}),
            )
            .await?;
        if let Some(e) = r.get("exceptionDetails") {
            bail!("{expr}: {e}");
        }
        Ok(r["result"]["value"].clone())
    }

    async fn click(&mut self, x: f64, y: f64) -> Result<()> {
        for kind in ["mousePressed", "mouseReleased"] {
            self.call(
                "Input.dispatchMouseEvent",
                json!({"type": kind, "x": x, "y": y, "button": "left", "clickCount": 1}),
            )
            .await?;
        }
        Ok(())
    }

    async fn screenshot(&mut self, path: &Path) -> Result<()> {
        let r = self
            .call("Page.captureScreenshot", json!({"format": "png"}))
            .await?;
        let png = base64::engine::general_purpose::STANDARD
            .decode(r["data"].as_str().context("no screenshot data")?)?;
        std::fs::write(path, png).with_context(|| format!("cannot write {}", path.display()))
    }
}

/// The Cargo target directory this test binary runs from (`target/debug/deps/page-*`).
fn target_dir() -> PathBuf {
    std::env::current_exe()
        .ok()
        .and_then(|p| p.ancestors().nth(3).map(Path::to_path_buf))
        .unwrap_or_else(|| PathBuf::from("target"))
}

/// What the page shows, read from its DOM.
async fn page_state(cdp: &mut Cdp) -> Result<Value> {
    let text = cdp
        .eval(
            "JSON.stringify({ready: document.body.dataset.ready, \
             confirmed: document.getElementById('confirmed-count').textContent, \
             sensors: document.querySelectorAll('#sensors .sensor').length, \
             search: location.search})",
        )
        .await?;
    Ok(serde_json::from_str(
        text.as_str().context("not a string")?,
    )?)
}

/// Open `url` and wait until the page is drawn and reports `expected` confirmed tracks.
async fn open_and_wait(cdp: &mut Cdp, url: &str, expected: usize) -> Result<Value> {
    cdp.call(
        "Emulation.setDeviceMetricsOverride",
        json!({"width": 1400, "height": 900, "deviceScaleFactor": 1, "mobile": false}),
    )
    .await?;
    cdp.call("Page.navigate", json!({"url": url})).await?;
    let start = Instant::now();
    loop {
        // Before the document exists the evaluation can fail; that is just "not yet".
        if let Ok(s) = page_state(cdp).await
            && s["ready"] == "1"
            && s["confirmed"]
                .as_str()
                .and_then(|c| c.parse::<usize>().ok())
                == Some(expected)
        {
            return Ok(s);
        }
        if start.elapsed() > CONFIRM_WITHIN {
            bail!(
                "the page did not show {expected} confirmed tracks within {CONFIRM_WITHIN:?}; last state {:?}",
                page_state(cdp).await.ok()
            );
        }
        tokio::time::sleep(Duration::from_millis(250)).await;
    }
}

#[tokio::test]
async fn demo_page_shows_every_vessel_in_coverage_as_a_confirmed_track() {
    let test = "demo_page_shows_every_vessel_in_coverage_as_a_confirmed_track";
    let Some(bin) = chromium_or_skip(test) else {
        return;
    };
    let _one = BROWSER.lock().await;
    let t0 = Instant::now();
    let expected = demo_vessels_in_coverage(60.0).unwrap();
    assert!(expected > 0, "the demo scenario has no vessel in coverage");
    let server = Server::start(&plotweave_bin!(), &["demo"]).unwrap();
    let (_browser, devtools) = launch(&bin).unwrap();
    let mut cdp = Cdp::connect(&devtools).await.unwrap();
    let state = open_and_wait(&mut cdp, &format!("http://{}/", server.addr), expected)
        .await
        .unwrap();
    assert_eq!(state["sensors"], 2, "one panel card per demo sensor");

    // The page's 2-sigma ellipse against nalgebra's symmetric eigen decomposition, for the
    // 2-D covariance [[4, 1.2], [1.2, 2]] of check-values.md §3.
    let cov = [4.0, 1.2, 0.0, 0.0, 2.0, 0.0, 0.0, 1.0, 0.0, 1.0];
    let e = cdp
        .eval(&format!(
            "JSON.stringify(plotweave.covEllipse({}, 2))",
            json!(cov)
        ))
        .await
        .unwrap();
    let e: Value = serde_json::from_str(e.as_str().unwrap()).unwrap();
    let eig = nalgebra::Matrix2::<f64>::new(4.0, 1.2, 1.2, 2.0).symmetric_eigen();
    let (imax, imin) = if eig.eigenvalues[0] > eig.eigenvalues[1] {
        (0, 1)
    } else {
        (1, 0)
    };
    let v = eig.eigenvectors.column(imax);
    let angle = v[1].atan2(v[0]).rem_euclid(std::f64::consts::PI);
    let close = |a: f64, b: f64| (a - b).abs() < 1e-9;
    assert!(
        close(
            e["major"].as_f64().unwrap(),
            2.0 * eig.eigenvalues[imax].sqrt()
        ),
        "{e}"
    );
    assert!(
        close(
            e["minor"].as_f64().unwrap(),
            2.0 * eig.eigenvalues[imin].sqrt()
        ),
        "{e}"
    );
    assert!(
        close(
            e["angle"]
                .as_f64()
                .unwrap()
                .rem_euclid(std::f64::consts::PI),
            angle
        ),
        "{e}"
    );

    // Let the side panel collect two polls (rates need a difference), then click on a
    // confirmed track: its card shows the state fetched from /v1/tracks/{id}.
    tokio::time::sleep(Duration::from_secs(3)).await;
    let tracks = cdp
        .eval("JSON.stringify(plotweave.tracksOnScreen())")
        .await
        .unwrap();
    let tracks: Vec<Value> = serde_json::from_str(tracks.as_str().unwrap()).unwrap();
    let pick = tracks
        .iter()
        .find(|t| t["status"] == "confirmed" && t["x"].as_f64().unwrap() < 1000.0)
        .expect("a confirmed track on screen");
    let id = pick["id"].as_u64().unwrap();
    cdp.click(pick["x"].as_f64().unwrap(), pick["y"].as_f64().unwrap())
        .await
        .unwrap();
    let start = Instant::now();
    loop {
        let card = cdp
            .eval(
                "JSON.stringify({hidden: document.getElementById('track-card').hidden, \
                 id: document.getElementById('track-id').textContent, \
                 state: document.getElementById('track-state').textContent})",
            )
            .await
            .unwrap();
        let card: Value = serde_json::from_str(card.as_str().unwrap()).unwrap();
        if card["hidden"] == false
            && card["id"].as_str().and_then(|c| c.parse::<u64>().ok()) == Some(id)
            && card["state"].as_str().unwrap().contains("confirmed")
        {
            break;
        }
        assert!(start.elapsed() < WAIT, "track card never showed: {card}");
        tokio::time::sleep(Duration::from_millis(200)).await;
    }
    tokio::time::sleep(Duration::from_millis(1500)).await;
    let shot = target_dir().join("page-screenshot.png");
    cdp.screenshot(&shot).await.unwrap();
    let png = std::fs::read(&shot).unwrap();
    assert_eq!(&png[..8], b"\x89PNG\r\n\x1a\n", "not a PNG");
    println!(
        "{test}: {expected} confirmed tracks shown; screenshot {} ({} bytes); {:.1} s",
        shot.display(),
        png.len(),
        t0.elapsed().as_secs_f64()
    );
}

/// A demo whose read token is set (from the environment, as `plotweave demo` reads it).
struct TokenDemo {
    child: Child,
    addr: String,
    stderr: PathBuf,
}

impl Drop for TokenDemo {
    fn drop(&mut self) {
        let _ = self.child.kill();
        let _ = self.child.wait();
    }
}

fn start_demo_with_read_token(token: &str) -> Result<TokenDemo> {
    use std::io::BufRead;
    let stderr = temp_dir("token-demo").join("stderr.log");
    let mut child = Command::new(plotweave_bin!())
        .args(["demo", "--listen", "127.0.0.1:0"])
        .env("PLOTWEAVE_READ_TOKEN", token)
        .env("RUST_LOG", "debug")
        .stdin(Stdio::null())
        .stdout(Stdio::piped())
        .stderr(std::fs::File::create(&stderr)?)
        .spawn()?;
    let stdout = child.stdout.take().context("no stdout")?;
    let (tx, rx) = std::sync::mpsc::channel();
    std::thread::spawn(move || {
        let mut lines = std::io::BufReader::new(stdout).lines();
        if let Some(Ok(first)) = lines.next() {
            let _ = tx.send(first);
        }
        for _ in lines {}
    });
    let mut demo = TokenDemo {
        child,
        addr: String::new(),
        stderr,
    };
    let first = rx
        .recv_timeout(WAIT)
        .map_err(|_| anyhow!("the demo printed no first line"))?;
    demo.addr = first
        .strip_prefix("listening on http://")
        .ok_or_else(|| anyhow!("unexpected first line {first:?}"))?
        .to_string();
    Ok(demo)
}

#[tokio::test]
async fn the_page_presents_the_read_token_and_never_leaks_it() {
    let test = "the_page_presents_the_read_token_and_never_leaks_it";
    let token = "page-read-token-7d41c09e";
    let demo = start_demo_with_read_token(token).unwrap();
    let hex: String = token.bytes().map(|b| format!("{b:02x}")).collect();

    // Without a token the echo is refused; with the bearer subprotocol it streams scans,
    // and the server selects the plain subprotocol, never the one carrying the token.
    let url = format!("ws://{}/v1/detections", demo.addr);
    let e = ws_connect(&url, None).await.unwrap_err().to_string();
    assert!(e.starts_with("HTTP 401"), "{e}");
    let mut req = url.as_str().into_client_request().unwrap();
    req.headers_mut().insert(
        "sec-websocket-protocol",
        format!("plotweave.v1, plotweave.bearer.{hex}")
            .parse()
            .unwrap(),
    );
    let (mut ws, resp) = tokio_tungstenite::connect_async(req).await.unwrap();
    assert_eq!(resp.headers()["sec-websocket-protocol"], "plotweave.v1");
    let echo = next_json(&mut ws).await.unwrap();
    assert!(
        echo["detections"].is_array() && echo["seq"].is_u64(),
        "{echo}"
    );
    drop(ws);

    let Some(bin) = chromium_or_skip(test) else {
        return;
    };
    let _one = BROWSER.lock().await;
    let expected = demo_vessels_in_coverage(60.0).unwrap();
    let (_browser, devtools) = launch(&bin).unwrap();
    let mut cdp = Cdp::connect(&devtools).await.unwrap();
    let state = open_and_wait(
        &mut cdp,
        &format!("http://{}/?token={token}", demo.addr),
        expected,
    )
    .await
    .unwrap();
    assert_eq!(state["search"], "", "the token stays in the address bar");
    let log = std::fs::read_to_string(&demo.stderr).unwrap();
    assert!(
        !log.contains(token) && !log.contains(&hex),
        "the token appears in the server log"
    );
}
