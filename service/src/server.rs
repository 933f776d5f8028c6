//! The live service: shared state ([`AppState`]), the path every accepted scan takes into the
//! engine ([`AppState::submit`]), the WebSocket sessions, and [`run`] with graceful shutdown.
//!
//! Shutdown (SIGTERM/SIGINT in `main`, or any future the caller passes to [`run`]):
//! 1. stop accepting connections and new requests;
//! 2. ingest sessions finish the batch in hand (it is queued and acknowledged), read nothing
//!    more, and close with 1001 "going away";
//! 3. the engine's input closes; the engine drains its queue, flushes the reorder buffer and
//!    publishes those frames;
//! 4. frame subscribers receive every remaining frame, then a close frame;
//! 5. `run` returns. Every step shares one deadline, `server.shutdown_timeout`; past it `run`
//!    logs what was still running and returns anyway, so the process never hangs.
//!
//! So every acknowledged batch appears in a frame sent to every subscriber that keeps up.

use std::future::Future;
use std::net::SocketAddr;
use std::sync::atomic::{AtomicU64, AtomicUsize, Ordering};
use std::sync::{Arc, Mutex};
use std::time::Instant;

use axum::extract::ws::{CloseFrame, Message, Utf8Bytes, close_code};
use filter_core::tracker::Scan;
use futures_util::{Sink, SinkExt, Stream, StreamExt};
use tokio::net::TcpListener;
use tokio::sync::mpsc;
use tokio_util::sync::CancellationToken;
use tokio_util::task::TaskTracker;
use tracing::Instrument;

use crate::config::{Secret, Site};
use crate::error::{Code, Error, Rejection};
use crate::http::TrackQuery;
use crate::keepalive::{Keepalive, give_up};
use crate::metrics::{
    self, AuthReason, CloseReason, EndpointLabels, Metrics, UNKNOWN_SENSOR_LABEL,
};
use crate::pipeline::{Admission, Engine, FrameMsg, Hub, Input, spawn_engine};
use crate::wire::{self, DecodeLimits};

/// Everything the handlers share. Cheap to clone.
#[derive(Clone)]
pub struct AppState(pub(crate) Arc<Shared>);

pub(crate) struct Shared {
    pub(crate) site: Arc<Site>,
    pub(crate) ids: Vec<String>,
    pub(crate) metrics: Arc<Metrics>,
    pub(crate) admission: tokio::sync::Mutex<Admission>,
    /// The engine's input. Taken (closed) during shutdown once ingest has stopped.
    engine_tx: Mutex<Option<mpsc::Sender<Input>>>,
    pub(crate) hub: Arc<Hub>,
    pub(crate) cancel: CancellationToken,
    /// Ingest sessions (while they read batches) and the demo feeder: they must end before
    /// the engine input closes.
    pub(crate) producers: TaskTracker,
    /// Every WebSocket session, to its last byte.
    pub(crate) consumers: TaskTracker,
    open_connections: AtomicUsize,
    next_connection: AtomicU64,
    pub(crate) limits: DecodeLimits,
    engine_thread: Mutex<Option<std::thread::JoinHandle<()>>>,
    /// Where accepted batches are recorded (`[server.recording]`), if anywhere.
    pub(crate) recorder: Option<crate::record::Recorder>,
}

impl AppState {
    /// Build the engine of `site` and start its thread.
    pub fn new(site: Site) -> Result<Self, Error> {
        let ids = site.sensor_ids();
        let metrics = Arc::new(Metrics::new(&ids));
        let mut engine = Engine::new(&site, metrics.clone())?;
        let mut admission = Admission::new(&site, true);
        // Restore before the recorder starts: its new file sorts after every file read here.
        let mut last_frame = None;
        let restored =
            crate::snapshot::restore(&site, &mut engine, &mut admission, &mut |p, j| {
                last_frame = Some((p, j.to_string()));
            })?;
        metrics
            .snapshot
            .restored_batches
            .set(restored.replayed as i64);
        let recorder = site
            .server
            .recording
            .clone()
            .map(|c| crate::record::Recorder::start_metered(c, metrics.recording.clone()))
            .transpose()?;
        let snapshotter = site
            .server
            .snapshot
            .as_ref()
            .map(|c| {
                crate::snapshot::Snapshotter::start(
                    &site,
                    c,
                    recorder.as_ref().map(|r| r.current_file_handle()),
                    &restored,
                    metrics.snapshot.clone(),
                )
            })
            .transpose()?;
        let hub = Hub::new(&engine, site.server.limits.frame_buffer);
        if let Some((picture, json)) = last_frame {
            hub.publish(picture, &json);
        }
        let (tx, rx) = mpsc::channel(site.server.limits.queue_depth.max(1));
        let thread = spawn_engine(engine, rx, hub.clone(), snapshotter)
            .map_err(|e| Error::io("cannot start the engine thread", e))?;
        Ok(AppState(Arc::new(Shared {
            admission: tokio::sync::Mutex::new(admission),
            limits: DecodeLimits {
                max_detections: site.server.limits.max_detections,
            },
            site: Arc::new(site),
            ids,
            metrics,
            engine_tx: Mutex::new(Some(tx)),
            hub,
            cancel: CancellationToken::new(),
            producers: TaskTracker::new(),
            consumers: TaskTracker::new(),
            open_connections: AtomicUsize::new(0),
            next_connection: AtomicU64::new(1),
            engine_thread: Mutex::new(Some(thread)),
            recorder,
        })))
    }

    /// The site being served.
    pub fn site(&self) -> &Site {
        &self.0.site
    }

    /// The metrics.
    pub fn metrics(&self) -> &Metrics {
        &self.0.metrics
    }

    /// The token that cancels everything (shutdown).
    pub fn cancel_token(&self) -> CancellationToken {
        self.0.cancel.clone()
    }

    pub(crate) fn sender(&self) -> Option<mpsc::Sender<Input>> {
        self.0
            .engine_tx
            .lock()
            .unwrap_or_else(std::sync::PoisonError::into_inner)
            .clone()
    }

    fn close_engine_input(&self) {
        self.0
            .engine_tx
            .lock()
            .unwrap_or_else(std::sync::PoisonError::into_inner)
            .take();
    }

    /// The metric label of sensor `index` (or `_unknown`).
    pub(crate) fn label(&self, index: Option<usize>) -> &str {
        index
            .and_then(|i| self.0.ids.get(i))
            .map_or(UNKNOWN_SENSOR_LABEL, String::as_str)
    }

    /// Count a rejection in the metrics.
    pub(crate) fn count_rejection(&self, r: &Rejection) {
        self.0.metrics.count_rejection(self.label(r.sensor), r.code);
    }

    /// Admit `scan` and queue it for the engine (waiting for room when the queue is full).
    /// `Ok` means the batch is accepted and may be acknowledged.
    pub async fn submit(&self, scan: Scan, received: Instant) -> Result<(), Rejection> {
        self.submit_recorded(scan, received, None).await
    }

    /// [`AppState::submit`], and where recording is on, record `text` (the batch as received)
    /// and return only once it is written per `server.recording.sync`. The line is queued in
    /// admission order, the order the engine sees. If writing fails the batch has been used
    /// but is refused `internal` (not acknowledged), so the sensor knows it is not on record.
    pub async fn submit_recorded(
        &self,
        scan: Scan,
        received: Instant,
        text: Option<&str>,
    ) -> Result<(), Rejection> {
        let shutting_down = |seq: u64| {
            Rejection::new(
                Code::ShuttingDown,
                Some(seq),
                format!("batch seq {seq}: the service is shutting down; batch not used"),
            )
        };
        let (sensor, seq, n) = (scan.sensor, scan.tag, scan.detections.len());
        let Some(tx) = self.sender() else {
            return Err(shutting_down(seq));
        };
        let (gap, written) = {
            let mut admission = self.0.admission.lock().await;
            let admitted = admission.admit(&scan, Some(received))?;
            tx.send(Input::Scan { scan, received })
                .await
                .map_err(|_| shutting_down(seq))?;
            // Queued under the same lock as the engine input: file order is engine order.
            let written = match (&self.0.recorder, text) {
                (Some(r), Some(t)) => Some(r.append(t, crate::record::unix_now())),
                _ => None,
            };
            (admitted.gap, written)
        };
        if let Some(w) = written {
            let failed = match w.await {
                Ok(Ok(())) => None,
                Ok(Err(msg)) => Some(msg),
                Err(_) => Some("the recorder has stopped".to_string()),
            };
            if let Some(msg) = failed {
                return Err(Rejection::new(
                    Code::Internal,
                    Some(seq),
                    format!("batch seq {seq}: used but not recorded ({msg}); not acknowledged"),
                )
                .for_sensor(sensor));
            }
        }
        let m = &self.0.metrics;
        let l = metrics::sensor(&self.0.ids[sensor]);
        m.batches_acked.get_or_create(&l).inc();
        m.detections.get_or_create(&l).inc_by(n as u64);
        if gap > 0 {
            m.seq_gaps.get_or_create(&l).inc_by(gap);
            tracing::info!(sensor = %self.0.ids[sensor], seq, missing = gap, "sequence gap");
        }
        m.queue_depth
            .set((tx.max_capacity() - tx.capacity()) as i64);
        Ok(())
    }

    /// Reserve one WebSocket connection slot, or refuse at `max_connections`.
    pub(crate) fn open_connection(
        &self,
        endpoint: &'static str,
    ) -> Result<ConnectionSlot, Rejection> {
        let max = self.0.site.server.limits.max_connections;
        let before = self.0.open_connections.fetch_add(1, Ordering::SeqCst);
        if before >= max {
            self.0.open_connections.fetch_sub(1, Ordering::SeqCst);
            self.0.metrics.connections_refused.inc();
            return Err(Rejection::new(
                Code::TooManyConnections,
                None,
                format!(
                    "{max} WebSocket connections are open, the limit server.limits.max_connections; try again later"
                ),
            ));
        }
        self.0
            .metrics
            .connections
            .get_or_create(&EndpointLabels {
                endpoint: endpoint.into(),
            })
            .inc();
        Ok(ConnectionSlot {
            state: self.clone(),
            endpoint,
            id: self.0.next_connection.fetch_add(1, Ordering::Relaxed),
        })
    }
}

/// One open WebSocket connection; releases its slot when dropped.
pub(crate) struct ConnectionSlot {
    state: AppState,
    endpoint: &'static str,
    pub(crate) id: u64,
}

impl Drop for ConnectionSlot {
    fn drop(&mut self) {
        self.state.0.open_connections.fetch_sub(1, Ordering::SeqCst);
        self.state
            .0
            .metrics
            .connections
            .get_or_create(&EndpointLabels {
                endpoint: self.endpoint.into(),
            })
            .dec();
    }
}

/// Compare a presented token with a configured one in constant time (for equal lengths).
pub(crate) fn token_matches(presented: &str, configured: &Secret) -> bool {
    use subtle::ConstantTimeEq;
    presented.as_bytes().ct_eq(configured.expose()).into()
}

/// Whose a presented token is: every configured token is compared (in constant time, without
/// stopping at a match), so the timing does not tell which one came close. Tokens are unique
/// (the configuration refuses two equal ones), so at most one matches.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub(crate) enum Role {
    /// Sensor `index`'s ingest token.
    Sensor(usize),
    /// `server.read_token`.
    Read,
    /// `server.admin_token`.
    Admin,
    /// No one's.
    Nobody,
}

/// The [`Role`] of `token` on `site`.
pub(crate) fn role_of(site: &Site, token: &str) -> Role {
    let mut role = Role::Nobody;
    for (i, e) in site.sensor_extra.iter().enumerate() {
        if let Some(t) = &e.token
            && token_matches(token, t)
        {
            role = Role::Sensor(i);
        }
    }
    for (configured, r) in [
        (&site.server.read_token, Role::Read),
        (&site.server.admin_token, Role::Admin),
    ] {
        if let Some(t) = configured
            && token_matches(token, t)
        {
            role = r;
        }
    }
    role
}

/// Who an ingest connection speaks for.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub(crate) enum Principal {
    /// The holder of sensor `index`'s token: may send for that sensor only.
    Sensor(usize),
    /// No token: may send for sensors that have no token configured.
    Anonymous,
}

impl Principal {
    /// Whether this principal may send batches of `sensor`.
    /// A refusal is counted in `plotweave_auth_refusals_total{endpoint="ingest"}`.
    pub(crate) fn check(self, state: &AppState, sensor: usize, seq: u64) -> Result<(), Rejection> {
        let ids = &state.0.ids;
        let refused = |reason| state.0.metrics.count_auth_refusal("ingest", reason);
        match self {
            Principal::Sensor(i) if i == sensor => Ok(()),
            Principal::Sensor(i) => Err({
                refused(AuthReason::WrongSensor);
                Rejection::new(
                Code::Forbidden,
                Some(seq),
                format!(
                    "batch seq {seq} from {:?}: this connection's token belongs to sensor {:?} and cannot send for another sensor",
                    ids[sensor], ids[i]
                ),
            )
            .for_sensor(sensor)
            }),
            Principal::Anonymous => {
                if state.0.site.sensor_extra[sensor].token.is_none() {
                    Ok(())
                } else {
                    refused(AuthReason::MissingToken);
                    Err(Rejection::new(
                        Code::Unauthorized,
                        Some(seq),
                        format!(
                            "batch seq {seq} from {:?}: this sensor requires its token (Authorization: Bearer ...) on the ingest connection",
                            ids[sensor]
                        ),
                    )
                    .for_sensor(sensor))
                }
            }
        }
    }
}

fn text(s: String) -> Message {
    Message::Text(Utf8Bytes::from(s))
}

fn close(code: u16, reason: &'static str) -> Message {
    Message::Close(Some(CloseFrame {
        code,
        reason: Utf8Bytes::from_static(reason),
    }))
}

/// How long a closing session keeps reading (and discarding) after its close frame, waiting
/// for the peer's close reply. Dropping the socket while the peer still sends would make the
/// kernel reset the connection, and the peer could lose replies it has not read yet.
pub const CLOSE_GRACE: std::time::Duration = std::time::Duration::from_secs(1);

/// Send a close frame, then wait up to [`CLOSE_GRACE`] for the peer's close (discarding
/// anything else it sends).
async fn close_gracefully<S, R>(sink: &mut S, stream: &mut R, code: u16, reason: &'static str)
where
    S: Sink<Message> + Unpin,
    R: Stream<Item = Result<Message, axum::Error>> + Unpin,
{
    if sink.send(close(code, reason)).await.is_err() {
        return;
    }
    let _ = tokio::time::timeout(CLOSE_GRACE, async {
        while let Some(Ok(m)) = stream.next().await {
            if matches!(m, Message::Close(_)) {
                break;
            }
        }
    })
    .await;
}

/// tungstenite's message for a message over the size limit ("Space limit exceeded: Message
/// too long: N > M"); axum passes it through as the error's text.
fn is_too_large(e: &axum::Error) -> bool {
    let s = e.to_string();
    s.contains("Space limit exceeded") || s.contains("too long")
}

/// One ingest connection: read batches, reply to each with an ack or an error; Ping the peer
/// and close it when it falls silent ([`crate::keepalive`]). Returns why it ended.
///
/// Written against `Sink`/`Stream` so that it runs on any message transport.
pub(crate) async fn ingest_session<S, R>(
    state: AppState,
    principal: Principal,
    mut sink: S,
    mut stream: R,
) -> CloseReason
where
    S: Sink<Message> + Unpin,
    R: Stream<Item = Result<Message, axum::Error>> + Unpin,
{
    let cancel = state.0.cancel.clone();
    let max_bytes = state.0.site.server.limits.max_message_bytes;
    // Shutdown waits for this token before it closes the engine input; it is released before
    // the close handshake so a slow peer cannot delay the engine's flush.
    let producing = state.0.producers.token();
    let mut alive = Keepalive::new(&state.0.site.server.limits);
    loop {
        let next = tokio::select! {
            biased;
            () = cancel.cancelled() => break,
            m = stream.next() => m,
            due = alive.due() => {
                let Err(why) = alive.act(due, &mut sink).await else {
                    continue;
                };
                drop(producing);
                return give_up(&mut sink, why).await;
            }
        };
        alive.heard();
        let reply = match next {
            None | Some(Ok(Message::Close(_))) => return CloseReason::Peer,
            Some(Err(e)) if is_too_large(&e) => {
                let r = Rejection::new(
                    Code::TooLarge,
                    None,
                    format!(
                        "batch (seq unknown): message exceeds server.limits.max_message_bytes = {max_bytes} ({e}); closing the connection"
                    ),
                );
                state.count_rejection(&r);
                tracing::info!(code = %r.code, "refused an oversized message");
                let _ = sink.send(text(r.to_json())).await;
                drop(producing);
                close_gracefully(
                    &mut sink,
                    &mut stream,
                    close_code::SIZE,
                    "message too large",
                )
                .await;
                return CloseReason::TooLarge;
            }
            Some(Err(e)) => {
                tracing::debug!(error = %e, "ingest connection failed");
                return CloseReason::Peer;
            }
            Some(Ok(Message::Text(t))) => handle_batch(&state, principal, t.as_str()).await,
            Some(Ok(Message::Binary(b))) => {
                let r = Rejection::new(
                    Code::BinaryFrame,
                    None,
                    format!(
                        "batch (seq unknown): binary message of {} bytes; batches are JSON text messages",
                        b.len()
                    ),
                );
                state.count_rejection(&r);
                r.to_json()
            }
            Some(Ok(_)) => continue, // ping/pong: pings are answered by the WebSocket layer
        };
        if let Err(why) = alive.send(&mut sink, text(reply)).await {
            drop(producing);
            return give_up(&mut sink, why).await;
        }
        // The session did not read while it handled this message: back-pressure may have held
        // it in `submit` for as long as the engine queue stayed full. That pause is ours, not
        // the peer's silence, so the idle clock restarts as the session listens again (see
        // `crate::keepalive`: pongs are not read during the pause, by design).
        alive.heard();
    }
    drop(producing);
    close_gracefully(
        &mut sink,
        &mut stream,
        close_code::AWAY,
        "service shutting down",
    )
    .await;
    CloseReason::Shutdown
}

/// Refuse a live batch stamped more than `server.limits.max_time_ahead` seconds ahead of the
/// server's clock (0 disables the check).
fn check_time_ahead(state: &AppState, scan: &Scan) -> Result<(), Rejection> {
    let limit = state.0.site.server.limits.max_time_ahead;
    if limit <= 0.0 {
        return Ok(());
    }
    let now = std::time::SystemTime::now()
        .duration_since(std::time::UNIX_EPOCH)
        .map_or(0.0, |d| d.as_secs_f64());
    if scan.time > now + limit {
        return Err(Rejection::new(
            Code::OutOfRange,
            Some(scan.tag),
            format!(
                "batch seq {} from {:?}: time: {} is {:.0} s ahead of the server clock; \
                 server.limits.max_time_ahead is {} s (check the sensor's clock)",
                scan.tag,
                state.0.ids[scan.sensor],
                scan.time,
                scan.time - now,
                limit
            ),
        )
        .for_sensor(scan.sensor));
    }
    Ok(())
}

/// Decode, authorise, admit and queue one batch; the reply text (`{"ack": seq}` or an error).
async fn handle_batch(state: &AppState, principal: Principal, text: &str) -> String {
    let received = Instant::now();
    let result = match wire::decode_batch(text, &state.0.site.sensors, state.0.limits) {
        Err(r) => {
            state
                .0
                .metrics
                .batches_received
                .get_or_create(&metrics::sensor(state.label(r.sensor)))
                .inc();
            Err(r)
        }
        Ok(scan) => {
            state
                .0
                .metrics
                .batches_received
                .get_or_create(&metrics::sensor(&state.0.ids[scan.sensor]))
                .inc();
            let seq = scan.tag;
            let span = tracing::debug_span!("batch", sensor = %state.0.ids[scan.sensor], seq);
            async {
                principal.check(state, scan.sensor, seq)?;
                check_time_ahead(state, &scan)?;
                state.submit_recorded(scan, received, Some(text)).await?;
                tracing::debug!("acknowledged");
                Ok(seq)
            }
            .instrument(span)
            .await
        }
    };
    match result {
        Ok(seq) => wire::ack_json(seq),
        Err(r) => {
            state.count_rejection(&r);
            tracing::debug!(code = %r.code, message = %r.message, "batch refused");
            r.to_json()
        }
    }
}

/// One frame subscriber: forward frames (filtered if asked) from `rx` until the client leaves
/// or the engine has published its last frame; Ping the peer and close it when it falls
/// silent ([`crate::keepalive`]). Returns why it ended.
///
/// The caller subscribes (`Hub::subscribe`) *before* it answers the upgrade, so every frame
/// made after the client saw its connection accepted reaches it; subscribing inside the
/// session would lose the frames of batches sent right after the handshake.
pub(crate) async fn frames_session<S, R>(
    state: AppState,
    filter: TrackQuery,
    mut rx: tokio::sync::broadcast::Receiver<std::sync::Arc<FrameMsg>>,
    mut sink: S,
    mut stream: R,
) -> CloseReason
where
    S: Sink<Message> + Unpin,
    R: Stream<Item = Result<Message, axum::Error>> + Unpin,
{
    let hub = &state.0.hub;
    let mut done = hub.done();
    let engine_done = async move {
        let _ = done.wait_for(|d| *d).await;
    };
    tokio::pin!(engine_done);
    let m = &state.0.metrics;
    m.frame_subscribers.inc();
    struct Unsubscribe<'a>(&'a Metrics);
    impl Drop for Unsubscribe<'_> {
        fn drop(&mut self) {
            self.0.frame_subscribers.dec();
        }
    }
    let _guard = Unsubscribe(m);
    let mut buf = String::new();
    let render = |msg: &FrameMsg, buf: &mut String| -> Message {
        if filter.is_empty() {
            Message::Text(msg.json.clone())
        } else {
            wire::write_frame(buf, &msg.picture, &state.0.ids, &filter);
            Message::Text(Utf8Bytes::from(buf.as_str()))
        }
    };
    use tokio::sync::broadcast::error::{RecvError, TryRecvError};
    let mut alive = Keepalive::new(&state.0.site.server.limits);
    // Sends are bounded by the idle timeout (`Keepalive::send`): a peer that stopped reading
    // would otherwise hold this session in a send forever, past its idle deadline.
    let sent = loop {
        tokio::select! {
            biased;
            // The peer first: a Pong waiting in the socket must be seen before the idle
            // deadline is judged, and a burst of frames must not starve it.
            msg = stream.next() => match msg {
                None | Some(Err(_)) | Some(Ok(Message::Close(_))) => return CloseReason::Peer,
                // Consumers have nothing to say: any message (a Pong) is proof of life;
                // their pings are answered below us.
                Some(Ok(_)) => alive.heard(),
            },
            due = alive.due() => {
                if let Err(why) = alive.act(due, &mut sink).await {
                    break Err(why);
                }
            }
            r = rx.recv() => match r {
                Ok(msg) => {
                    if let Err(why) = alive.send(&mut sink, render(&msg, &mut buf)).await {
                        break Err(why);
                    }
                }
                Err(RecvError::Lagged(n)) => {
                    m.frames_skipped.inc_by(n);
                    if let Err(why) = alive.send(&mut sink, text(wire::skipped_json(n))).await {
                        break Err(why);
                    }
                }
                Err(RecvError::Closed) => break Ok(()),
            },
            () = &mut engine_done => {
                let drained = loop {
                    let msg = match rx.try_recv() {
                        Ok(msg) => render(&msg, &mut buf),
                        Err(TryRecvError::Lagged(n)) => {
                            m.frames_skipped.inc_by(n);
                            text(wire::skipped_json(n))
                        }
                        Err(_) => break Ok(()),
                    };
                    if let Err(why) = alive.send(&mut sink, msg).await {
                        break Err(why);
                    }
                };
                break drained;
            }
        }
    };
    if let Err(why) = sent {
        return give_up(&mut sink, why).await;
    }
    close_gracefully(
        &mut sink,
        &mut stream,
        close_code::AWAY,
        "service shutting down",
    )
    .await;
    CloseReason::Shutdown
}

/// Refuse to serve an open (token-less) surface on a non-loopback address unless allowed.
pub fn check_exposure(site: &Site, addr: SocketAddr, allow_open: bool) -> Result<(), Error> {
    let open = site.open_surfaces();
    if addr.ip().is_loopback() || allow_open || open.is_empty() {
        return Ok(());
    }
    Err(Error::Usage(format!(
        "refusing to listen on {addr}, which is not a loopback address, while these parts need no token: {}. Configure tokens (see docs/configuration.md) or pass --allow-open",
        open.join("; ")
    )))
}

/// Serve `state` on `listener` until `shutdown` completes, then shut down gracefully (see the
/// module doc). Returns when everything has stopped or `server.shutdown_timeout` has passed.
pub async fn run(
    listener: TcpListener,
    state: AppState,
    shutdown: impl Future<Output = ()> + Send + 'static,
) -> Result<(), Error> {
    let cancel = state.0.cancel.clone();
    {
        let cancel = cancel.clone();
        tokio::spawn(async move {
            tokio::select! {
                () = shutdown => cancel.cancel(),
                () = cancel.cancelled() => {}
            }
        });
    }
    tracing::info!(site = %state.0.site.name, "serving");
    let app = crate::http::app(state.clone());
    // TCP_NODELAY on every accepted socket: acks and frames are small messages, and with
    // Nagle's algorithm a small write that follows another waits for the peer's delayed ACK
    // (up to 40 ms on Linux), which showed as a latency tail in the load test.
    use axum::serve::ListenerExt as _;
    let listener = listener.tap_io(|tcp| {
        if let Err(e) = tcp.set_nodelay(true) {
            tracing::warn!(error = %e, "cannot set TCP_NODELAY on an accepted connection");
        }
    });
    let serve = axum::serve(
        listener,
        app.into_make_service_with_connect_info::<SocketAddr>(),
    )
    .with_graceful_shutdown(cancel.clone().cancelled_owned());
    let server = tokio::spawn(async move { serve.await });
    cancel.cancelled().await;
    tracing::info!("shutting down: no new connections; draining ingest");
    let deadline = state.0.site.server.shutdown_timeout;
    let s = state.clone();
    let drained = tokio::time::timeout(deadline, async move {
        match server.await {
            Ok(Ok(())) => {}
            Ok(Err(e)) => tracing::warn!(error = %e, "server stopped with an error"),
            Err(e) => tracing::warn!(error = %e, "server task failed"),
        }
        s.0.producers.close();
        s.0.producers.wait().await;
        s.close_engine_input();
        tracing::info!("ingest stopped; engine draining and flushing");
        let mut done = s.0.hub.done();
        let _ = done.wait_for(|d| *d).await;
        s.0.consumers.close();
        s.0.consumers.wait().await;
    })
    .await;
    match drained {
        Ok(()) => {
            let thread = state
                .0
                .engine_thread
                .lock()
                .unwrap_or_else(std::sync::PoisonError::into_inner)
                .take();
            if let Some(t) = thread
                && t.join().is_err()
            {
                tracing::error!("the engine thread panicked");
            }
            tracing::info!("shutdown complete");
        }
        Err(_) => {
            state.close_engine_input();
            tracing::warn!(
                timeout_s = deadline.as_secs_f64(),
                ingest_sessions = state.0.producers.len(),
                frame_sessions = state.0.consumers.len(),
                "shutdown timed out; exiting anyway"
            );
        }
    }
    if let Some(r) = &state.0.recorder {
        r.shutdown();
    }
    Ok(())
}

/// Completes on SIGINT (Ctrl-C) or SIGTERM.
pub async fn shutdown_signal() {
    let ctrl_c = async {
        if tokio::signal::ctrl_c().await.is_err() {
            std::future::pending::<()>().await;
        }
    };
    #[cfg(unix)]
    let term = async {
        match tokio::signal::unix::signal(tokio::signal::unix::SignalKind::terminate()) {
            Ok(mut s) => {
                s.recv().await;
            }
            Err(_) => std::future::pending::<()>().await,
        }
    };
    #[cfg(not(unix))]
    let term = std::future::pending::<()>();
    tokio::select! {
        () = ctrl_c => {}
        () = term => {}
    }
    tracing::info!("shutdown signal received");
}

#[cfg(test)]
mod tests {
    use super::*;
    use std::sync::Mutex as StdMutex;

    /// Run an ingest session over an in-memory transport and return its replies.
    async fn session(state: &AppState, principal: Principal, input: Vec<Message>) -> Vec<Message> {
        let out = Arc::new(StdMutex::new(Vec::new()));
        let out2 = out.clone();
        let sink = futures_util::sink::unfold((), move |(), m: Message| {
            let out = out2.clone();
            async move {
                out.lock().unwrap().push(m);
                Ok::<(), std::convert::Infallible>(())
            }
        });
        let stream = futures_util::stream::iter(input.into_iter().map(Ok));
        let _ = ingest_session(state.clone(), principal, Box::pin(sink), stream).await;
        out.lock().unwrap().clone()
    }

    fn replies(msgs: &[Message]) -> Vec<serde_json::Value> {
        msgs.iter()
            .filter_map(|m| match m {
                Message::Text(t) => serde_json::from_str(t.as_str()).ok(),
                _ => None,
            })
            .collect()
    }

    #[tokio::test]
    async fn ingest_session_replies_once_per_message() {
        let state = AppState::new(Site::demo(|_| None).unwrap()).unwrap();
        let msgs = vec![
            text(r#"{"sensor":"north-mole-camera","seq":1,"time":100.0,"detections":[{"x":1.0,"y":900.0}]}"#.into()),
            text(r#"{"sensor":"north-mole-camera","seq":1,"time":101.0,"detections":[]}"#.into()),
            Message::Binary(vec![0u8; 4].into()),
            text(r#"{"sensor":"north-mole-camera","seq":2,"time":102.0,"detections":[]}"#.into()),
        ];
        let r = replies(&session(&state, Principal::Anonymous, msgs).await);
        assert_eq!(r.len(), 4);
        assert_eq!(r[0], serde_json::json!({"ack": 1}));
        assert_eq!(r[1]["error"]["code"], "duplicate_seq");
        assert_eq!(r[2]["error"]["code"], "binary_frame");
        assert_eq!(r[3], serde_json::json!({"ack": 2}));
    }

    #[tokio::test]
    async fn a_sensor_token_cannot_send_for_another_sensor() {
        let mut site = Site::demo(|_| None).unwrap();
        site.sensor_extra[0].token = Some(Secret::new("radar-token-0123456789"));
        let state = AppState::new(site).unwrap();
        let msgs = vec![
            text(r#"{"sensor":"north-mole-camera","seq":1,"time":100.0,"detections":[]}"#.into()),
            text(r#"{"sensor":"kestrel-radar","seq":1,"time":100.0,"detections":[]}"#.into()),
        ];
        let r = replies(&session(&state, Principal::Sensor(0), msgs.clone()).await);
        assert_eq!(r[0]["error"]["code"], "forbidden");
        assert_eq!(r[1], serde_json::json!({"ack": 1}));
        // Anonymous may send for the camera (no token) but not for the radar (token set).
        let msgs = vec![
            text(r#"{"sensor":"north-mole-camera","seq":1,"time":101.0,"detections":[]}"#.into()),
            text(r#"{"sensor":"kestrel-radar","seq":2,"time":101.0,"detections":[]}"#.into()),
        ];
        let r = replies(&session(&state, Principal::Anonymous, msgs).await);
        assert_eq!(r[0], serde_json::json!({"ack": 1}));
        assert_eq!(r[1]["error"]["code"], "unauthorized");
    }

    /// Regression guard for the keepalive: an ingest session held in `submit` (as
    /// back-pressure holds it while the engine queue is full; here the admission lock is held,
    /// which stops it at the same await) for longer than `idle_timeout` is not closed as dead
    /// when it resumes: it acknowledges the batch and gives the peer a full `idle_timeout`
    /// from then on. Virtual time (`start_paused`), so the durations are exact.
    #[tokio::test(start_paused = true)]
    async fn an_ingest_session_paused_by_back_pressure_is_not_mistaken_for_dead() {
        use tokio::time::{Duration, Instant};
        let mut site = Site::demo(|_| None).unwrap();
        site.server.limits.ping_interval = 1.0;
        site.server.limits.idle_timeout = 3.0;
        let state = AppState::new(site).unwrap();
        let (to_session, from_test) = mpsc::unbounded_channel::<Message>();
        let stream = Box::pin(futures_util::stream::unfold(
            from_test,
            |mut rx| async move { rx.recv().await.map(|m| (Ok::<_, axum::Error>(m), rx)) },
        ));
        let (to_test, mut from_session) = mpsc::unbounded_channel::<(Instant, Message)>();
        let sink = Box::pin(futures_util::sink::unfold(
            to_test,
            |tx, m: Message| async move {
                let _ = tx.send((Instant::now(), m));
                Ok::<_, std::convert::Infallible>(tx)
            },
        ));
        let paused = state.0.admission.lock().await;
        let session = tokio::spawn(ingest_session(
            state.clone(),
            Principal::Anonymous,
            sink,
            stream,
        ));
        to_session
            .send(text(
                r#"{"sensor":"north-mole-camera","seq":1,"time":100.0,"detections":[]}"#.into(),
            ))
            .unwrap();
        // Paused for ten seconds, more than three idle timeouts; the peer says nothing more.
        tokio::time::sleep(Duration::from_secs(10)).await;
        assert!(
            from_session.try_recv().is_err(),
            "nothing is sent while paused"
        );
        let resumed = Instant::now();
        drop(paused);
        let (_, first) = from_session.recv().await.unwrap();
        assert_eq!(first, text(r#"{"ack":1}"#.into()));
        let mut pings = 0;
        let closed_at = loop {
            match from_session.recv().await.unwrap() {
                (_, Message::Ping(_)) => pings += 1,
                (at, Message::Close(Some(f))) => {
                    assert_eq!(f.code, close_code::AWAY);
                    break at;
                }
                (_, other) => panic!("unexpected {other:?}"),
            }
        };
        assert_eq!(closed_at - resumed, Duration::from_secs(3));
        assert!(pings >= 2, "{pings}");
        assert_eq!(session.await.unwrap(), CloseReason::IdleTimeout);
        drop(to_session);
    }

    #[test]
    fn exposure_rule() {
        let site = Site::demo(|_| None).unwrap();
        let public: SocketAddr = "0.0.0.0:8740".parse().unwrap();
        assert!(check_exposure(&site, "127.0.0.1:8740".parse().unwrap(), false).is_ok());
        assert!(check_exposure(&site, public, true).is_ok());
        let e = check_exposure(&site, public, false)
            .unwrap_err()
            .to_string();
        assert!(
            e.contains("ingest for sensor \"kestrel-radar\" (no token)"),
            "{e}"
        );
        assert!(e.contains("admin (no server.admin_token)"), "{e}");
        assert!(token_matches("abc", &Secret::new("abc")));
        assert!(!token_matches("abd", &Secret::new("abc")));
        assert!(!token_matches("ab", &Secret::new("abc")));
    }
}
