//! Helpers of the end-to-end tests: start the real `plotweave` binary on port 0, talk to it
//! over real sockets (WebSocket via tokio-tungstenite, HTTP/1.1 by hand), stop it with SIGTERM.
//!
//! The binary is `plotweave-under-test`, declared in this package's `Cargo.toml` from the very
//! same `service/src/main.rs` and linked against the same `plotweave` library, because Cargo
//! sets `CARGO_BIN_EXE_<name>` only for a package's own binaries. Tests name it with
//! [`plotweave_bin!`]; `PLOTWEAVE_BIN` in the environment overrides it (to test an installed or
//! release build).

use std::io::{BufRead, BufReader, Read};
use std::path::{Path, PathBuf};
use std::process::{Child, Command, ExitStatus, Stdio};
use std::sync::atomic::{AtomicU64, Ordering};
use std::time::{Duration, Instant};

use anyhow::{Context, Result, anyhow, bail};
use futures_util::{SinkExt, StreamExt};
use tokio::io::{AsyncReadExt, AsyncWriteExt};
use tokio::net::TcpStream;
use tokio_tungstenite::tungstenite::Message;
use tokio_tungstenite::tungstenite::client::IntoClientRequest;
use tokio_tungstenite::{MaybeTlsStream, WebSocketStream};

pub mod load;

/// Path of the binary under test (expands to `env!` in the calling test crate).
#[macro_export]
macro_rules! plotweave_bin {
    () => {
        $crate::resolve_bin(env!("CARGO_BIN_EXE_plotweave-under-test"))
    };
}

/// `PLOTWEAVE_BIN` if set, else `built`.
pub fn resolve_bin(built: &str) -> PathBuf {
    std::env::var_os("PLOTWEAVE_BIN").map_or_else(|| PathBuf::from(built), PathBuf::from)
}

/// How long any single wait in these tests may take before the test fails.
pub const WAIT: Duration = Duration::from_secs(10);

static COUNTER: AtomicU64 = AtomicU64::new(0);

/// A fresh directory under the system temp dir for one test.
pub fn temp_dir(name: &str) -> PathBuf {
    let n = COUNTER.fetch_add(1, Ordering::Relaxed);
    let d = std::env::temp_dir().join(format!("plotweave-e2e-{}-{name}-{n}", std::process::id()));
    let _ = std::fs::remove_dir_all(&d);
    std::fs::create_dir_all(&d).expect("create temp dir");
    d
}

/// Tokens of [`site_toml`].
pub const RADAR_TOKEN: &str = "radar-token-5f1c9a77e2";
/// Tokens of [`site_toml`].
pub const CAMERA_TOKEN: &str = "camera-token-0b6d4e13aa";
/// Tokens of [`site_toml`].
pub const READ_TOKEN: &str = "read-token-8c2f7d01b4";
/// Tokens of [`site_toml`].
pub const ADMIN_TOKEN: &str = "admin-token-31e9b5c6d0";

/// An invented test site ("Gannet Sound"): a polar radar `sound-radar` at the origin and a
/// cartesian camera `quay-camera`, all tokens set; `extra` is appended (e.g. limits).
pub fn site_toml(limits: &str) -> String {
    format!(
        r#"
[site]
name = "Gannet Sound"

[tracker]
association = "jpda"
reorder_window = 0.0

[[sensor]]
id = "sound-radar"
kind = "polar"
position = {{ x = 0.0, y = 0.0 }}
noise = {{ range = 10.0, bearing_deg = 0.5 }}
fov = {{ max_range = 5000.0 }}
detection_probability = 0.9
clutter_rate = 2.0
birth_rate = 0.05
token = "{RADAR_TOKEN}"

[[sensor]]
id = "quay-camera"
kind = "cartesian"
noise = {{ sigma = 2.0 }}
fov = {{ x_min = -1000.0, x_max = 1000.0, y_min = 0.0, y_max = 2000.0 }}
detection_probability = 0.9
clutter_rate = 0.1
birth_rate = 0.05
token = "{CAMERA_TOKEN}"

[server]
read_token = "{READ_TOKEN}"
admin_token = "{ADMIN_TOKEN}"

[server.limits]
{limits}
"#
    )
}

/// Write `text` to `dir/name` and return the path.
pub fn write_file(dir: &Path, name: &str, text: &str) -> PathBuf {
    let p = dir.join(name);
    std::fs::write(&p, text).expect("write file");
    p
}

/// A running `plotweave` process.
pub struct Server {
    child: Option<Child>,
    /// `HOST:PORT` it listens on.
    pub addr: String,
    stderr_path: PathBuf,
    stdout_path: PathBuf,
}

impl Server {
    /// Start `plotweave ARGS --listen 127.0.0.1:0` and wait for its `listening on` line.
    pub fn start(bin: &Path, args: &[&str]) -> Result<Server> {
        Self::start_with_env(bin, args, &[])
    }

    /// [`Server::start`] with extra environment variables (`("RUST_LOG", "trace")` overrides
    /// the default `info`). Standard output is kept as well as standard error
    /// ([`Server::stdout`]).
    pub fn start_with_env(bin: &Path, args: &[&str], env: &[(&str, &str)]) -> Result<Server> {
        let dir = temp_dir("server");
        let stderr_path = dir.join("stderr.log");
        let stdout_path = dir.join("stdout.log");
        let stderr = std::fs::File::create(&stderr_path)?;
        let mut stdout_file = std::fs::File::create(&stdout_path)?;
        let mut child = Command::new(bin)
            .args(args)
            .args(["--listen", "127.0.0.1:0"])
            .env("RUST_LOG", "info")
            .envs(env.iter().copied())
            .stdin(Stdio::null())
            .stdout(Stdio::piped())
            .stderr(stderr)
            .spawn()
            .with_context(|| format!("cannot start {}", bin.display()))?;
        let stdout = child.stdout.take().context("no stdout")?;
        let (tx, rx) = std::sync::mpsc::channel();
        std::thread::spawn(move || {
            use std::io::Write as _;
            let mut lines = BufReader::new(stdout).lines();
            if let Some(Ok(first)) = lines.next() {
                let _ = writeln!(stdout_file, "{first}");
                let _ = tx.send(first);
            }
            // Keep draining (and keeping) so the child never blocks on a full pipe.
            for line in lines.map_while(Result::ok) {
                let _ = writeln!(stdout_file, "{line}");
            }
        });
        let first = match rx.recv_timeout(WAIT) {
            Ok(l) => l,
            Err(_) => {
                let _ = child.kill();
                let _ = child.wait();
                bail!(
                    "server printed no first line; stderr:\n{}",
                    std::fs::read_to_string(&stderr_path).unwrap_or_default()
                );
            }
        };
        let addr = first
            .strip_prefix("listening on http://")
            .ok_or_else(|| anyhow!("unexpected first line {first:?}"))?
            .to_string();
        Ok(Server {
            child: Some(child),
            addr,
            stderr_path,
            stdout_path,
        })
    }

    /// The process id, while it runs.
    pub fn pid(&self) -> Option<u32> {
        self.child.as_ref().map(|c| c.id())
    }

    /// `ws://ADDR{path}`.
    pub fn ws_url(&self, path: &str) -> String {
        format!("ws://{}{path}", self.addr)
    }

    /// The server's standard error so far.
    pub fn stderr(&self) -> String {
        std::fs::read_to_string(&self.stderr_path).unwrap_or_default()
    }

    /// The server's standard output so far (its `listening on` line included).
    pub fn stdout(&self) -> String {
        std::fs::read_to_string(&self.stdout_path).unwrap_or_default()
    }

    /// Send SIGTERM (via the `kill` command, to this child's pid only).
    pub fn sigterm(&self) -> Result<()> {
        let pid = self.child.as_ref().context("already stopped")?.id();
        let st = Command::new("kill")
            .args(["-TERM", &pid.to_string()])
            .status()?;
        if !st.success() {
            bail!("kill -TERM {pid} failed");
        }
        Ok(())
    }

    /// Kill the process with SIGKILL (no chance to flush anything) and reap it.
    pub fn sigkill(&mut self) -> Result<()> {
        let mut child = self.child.take().context("already stopped")?;
        child.kill()?;
        child.wait()?;
        Ok(())
    }

    /// Wait for the process to exit, at most `timeout`.
    pub fn wait_exit(&mut self, timeout: Duration) -> Result<ExitStatus> {
        let child = self.child.as_mut().context("already stopped")?;
        let start = Instant::now();
        loop {
            if let Some(st) = child.try_wait()? {
                self.child = None;
                return Ok(st);
            }
            if start.elapsed() > timeout {
                bail!("server did not exit within {timeout:?}");
            }
            std::thread::sleep(Duration::from_millis(20));
        }
    }
}

impl Drop for Server {
    fn drop(&mut self) {
        if let Some(mut c) = self.child.take() {
            let _ = c.kill();
            let _ = c.wait();
        }
    }
}

/// A WebSocket client connection.
pub type Ws = WebSocketStream<MaybeTlsStream<TcpStream>>;

/// Connect to `url`, with `Authorization: Bearer token` when given. On a refused upgrade the
/// error carries the HTTP status and body.
pub async fn ws_connect(url: &str, token: Option<&str>) -> Result<Ws> {
    let auth = token.map(|t| format!("Bearer {t}"));
    let headers: Vec<(&str, &str)> = auth
        .as_deref()
        .map(|a| ("authorization", a))
        .into_iter()
        .collect();
    ws_connect_with(url, &headers).await
}

/// Connect to `url` with extra request `headers` (name, value), e.g. a malformed
/// `Authorization`. On a refused upgrade the error carries the HTTP status and body.
pub async fn ws_connect_with(url: &str, headers: &[(&str, &str)]) -> Result<Ws> {
    let mut req = url.into_client_request()?;
    for (name, value) in headers {
        req.headers_mut().append(
            tokio_tungstenite::tungstenite::http::HeaderName::from_bytes(name.as_bytes())?,
            value.parse()?,
        );
    }
    match tokio::time::timeout(WAIT, tokio_tungstenite::connect_async(req)).await {
        Err(_) => bail!("connect to {url} timed out"),
        Ok(Ok((ws, _))) => Ok(ws),
        Ok(Err(tokio_tungstenite::tungstenite::Error::Http(resp))) => {
            let body = resp
                .body()
                .as_ref()
                .map(|b| String::from_utf8_lossy(b).into_owned())
                .unwrap_or_default();
            bail!("HTTP {} {body}", resp.status().as_u16())
        }
        Ok(Err(e)) => Err(e.into()),
    }
}

/// What the next message of a connection was.
#[derive(Debug, Clone, PartialEq)]
pub enum Incoming {
    /// A text message parsed as JSON.
    Json(serde_json::Value),
    /// A close frame with its code.
    Close(Option<u16>),
    /// The stream ended without a close frame.
    End,
}

/// The next text/close message of `ws` (pings skipped), failing after [`WAIT`].
pub async fn next(ws: &mut Ws) -> Result<Incoming> {
    loop {
        let m = tokio::time::timeout(WAIT, ws.next())
            .await
            .map_err(|_| anyhow!("no message within {WAIT:?}"))?;
        match m {
            None => return Ok(Incoming::End),
            Some(Err(e)) => {
                use tokio_tungstenite::tungstenite::Error as E;
                match e {
                    E::ConnectionClosed | E::AlreadyClosed | E::Protocol(_) | E::Io(_) => {
                        return Ok(Incoming::End);
                    }
                    other => return Err(other.into()),
                }
            }
            Some(Ok(Message::Text(t))) => {
                return Ok(Incoming::Json(
                    serde_json::from_str(t.as_str()).with_context(|| format!("not JSON: {t}"))?,
                ));
            }
            Some(Ok(Message::Close(f))) => return Ok(Incoming::Close(f.map(|f| f.code.into()))),
            Some(Ok(_)) => continue,
        }
    }
}

/// The next JSON message (fails on close).
pub async fn next_json(ws: &mut Ws) -> Result<serde_json::Value> {
    match next(ws).await? {
        Incoming::Json(v) => Ok(v),
        other => bail!("expected a JSON message, got {other:?}"),
    }
}

/// Send one text message.
pub async fn send_text(ws: &mut Ws, text: impl Into<String>) -> Result<()> {
    ws.send(Message::text(text.into())).await?;
    Ok(())
}

/// Send a batch and return the reply.
pub async fn send_batch(ws: &mut Ws, batch: &serde_json::Value) -> Result<serde_json::Value> {
    send_text(ws, batch.to_string()).await?;
    next_json(ws).await
}

/// The `error.code` of a reply, or `None` for an ack.
pub fn error_code(reply: &serde_json::Value) -> Option<&str> {
    reply["error"]["code"].as_str()
}

/// A camera batch with detections at `points` (site frame, m).
pub fn camera_batch(seq: u64, time: f64, points: &[(f64, f64)]) -> serde_json::Value {
    let dets: Vec<_> = points
        .iter()
        .map(|(x, y)| serde_json::json!({"x": x, "y": y}))
        .collect();
    serde_json::json!({"sensor": "quay-camera", "seq": seq, "time": time, "detections": dets})
}

/// A radar batch with detections at `(range m, bearing deg)`.
pub fn radar_batch(seq: u64, time: f64, points: &[(f64, f64)]) -> serde_json::Value {
    let dets: Vec<_> = points
        .iter()
        .map(|(r, b)| serde_json::json!({"range": r, "bearing": b}))
        .collect();
    serde_json::json!({"sensor": "sound-radar", "seq": seq, "time": time, "detections": dets})
}

/// An HTTP response.
#[derive(Debug, Clone)]
pub struct Response {
    /// Status code.
    pub status: u16,
    /// Headers, names lower-cased.
    pub headers: Vec<(String, String)>,
    /// Body text.
    pub body: String,
}

impl Response {
    /// The body as JSON.
    pub fn json(&self) -> Result<serde_json::Value> {
        serde_json::from_str(&self.body).with_context(|| format!("not JSON: {}", self.body))
    }

    /// A header's value.
    pub fn header(&self, name: &str) -> Option<&str> {
        self.headers
            .iter()
            .find(|(n, _)| n == name)
            .map(|(_, v)| v.as_str())
    }
}

/// One HTTP/1.1 request with `Connection: close`.
pub async fn http(
    addr: &str,
    method: &str,
    path: &str,
    token: Option<&str>,
    body: Option<&str>,
) -> Result<Response> {
    let auth = token.map(|t| format!("Bearer {t}"));
    let headers: Vec<(&str, &str)> = auth
        .as_deref()
        .map(|a| ("Authorization", a))
        .into_iter()
        .collect();
    http_with(addr, method, path, &headers, body).await
}

/// [`http`] with arbitrary request `headers` (name, value), e.g. a malformed `Authorization`.
pub async fn http_with(
    addr: &str,
    method: &str,
    path: &str,
    headers: &[(&str, &str)],
    body: Option<&str>,
) -> Result<Response> {
    let fut = async {
        let mut s = TcpStream::connect(addr).await?;
        let mut req = format!("{method} {path} HTTP/1.1\r\nHost: {addr}\r\nConnection: close\r\n");
        for (name, value) in headers {
            req.push_str(&format!("{name}: {value}\r\n"));
        }
        if let Some(b) = body {
            req.push_str(&format!(
                "Content-Type: application/json\r\nContent-Length: {}\r\n",
                b.len()
            ));
        }
        req.push_str("\r\n");
        if let Some(b) = body {
            req.push_str(b);
        }
        s.write_all(req.as_bytes()).await?;
        let mut raw = Vec::new();
        s.read_to_end(&mut raw).await?;
        parse_response(&raw)
    };
    tokio::time::timeout(WAIT, fut)
        .await
        .map_err(|_| anyhow!("{method} {path} timed out"))?
}

fn parse_response(raw: &[u8]) -> Result<Response> {
    let split = raw
        .windows(4)
        .position(|w| w == b"\r\n\r\n")
        .context("no end of headers")?;
    let head = std::str::from_utf8(&raw[..split])?;
    let mut lines = head.split("\r\n");
    let status_line = lines.next().context("no status line")?;
    let status: u16 = status_line
        .split(' ')
        .nth(1)
        .context("no status")?
        .parse()?;
    let headers: Vec<(String, String)> = lines
        .filter_map(|l| l.split_once(':'))
        .map(|(n, v)| (n.trim().to_ascii_lowercase(), v.trim().to_string()))
        .collect();
    let mut body = raw[split + 4..].to_vec();
    if headers
        .iter()
        .any(|(n, v)| n == "transfer-encoding" && v.contains("chunked"))
    {
        body = dechunk(&body)?;
    }
    Ok(Response {
        status,
        headers,
        body: String::from_utf8(body)?,
    })
}

fn dechunk(mut data: &[u8]) -> Result<Vec<u8>> {
    let mut out = Vec::new();
    loop {
        let eol = data
            .windows(2)
            .position(|w| w == b"\r\n")
            .context("bad chunk")?;
        let size = usize::from_str_radix(std::str::from_utf8(&data[..eol])?.trim(), 16)?;
        data = &data[eol + 2..];
        if size == 0 {
            return Ok(out);
        }
        out.extend_from_slice(&data[..size]);
        data = &data[size + 2..];
    }
}

/// Run the binary to completion with `args`; (status, stdout, stderr).
pub fn run_to_end(bin: &Path, args: &[&str]) -> Result<(ExitStatus, Vec<u8>, String)> {
    let mut child = Command::new(bin)
        .args(args)
        .stdin(Stdio::null())
        .stdout(Stdio::piped())
        .stderr(Stdio::piped())
        .spawn()?;
    let mut out = Vec::new();
    let mut err = String::new();
    let mut so = child.stdout.take().context("stdout")?;
    let mut se = child.stderr.take().context("stderr")?;
    let t = std::thread::spawn(move || {
        let mut e = String::new();
        let _ = se.read_to_string(&mut e);
        e
    });
    so.read_to_end(&mut out)?;
    err.push_str(&t.join().map_err(|_| anyhow!("stderr reader panicked"))?);
    let st = child.wait()?;
    Ok((st, out, err))
}

/// Scrape `/metrics` and parse it with the `prometheus-parse` exposition parser.
pub async fn scrape(addr: &str) -> Result<prometheus_parse::Scrape> {
    let r = http(addr, "GET", "/metrics", None, None).await?;
    if r.status != 200 {
        bail!("/metrics answered {}", r.status);
    }
    let lines = r.body.lines().map(|l| Ok(l.to_string()));
    Ok(prometheus_parse::Scrape::parse(lines)?)
}

/// The value of sample `name` whose labels include every `(key, value)` of `labels`.
pub fn sample(
    scrape: &prometheus_parse::Scrape,
    name: &str,
    labels: &[(&str, &str)],
) -> Option<f64> {
    scrape
        .samples
        .iter()
        .find(|s| s.metric == name && labels.iter().all(|(k, v)| s.labels.get(k) == Some(*v)))
        .and_then(|s| match s.value {
            prometheus_parse::Value::Counter(v)
            | prometheus_parse::Value::Gauge(v)
            | prometheus_parse::Value::Untyped(v) => Some(v),
            _ => None,
        })
}
