//! The HTTP surface: [`app`] builds the router (so handlers can be tested without a socket),
//! plus the handlers of every path and their authorisation.
//!
//! | path | what | token |
//! | --- | --- | --- |
//! | `GET /v1/ingest` (WebSocket) | sensors send batches, one reply per batch | the sensor's (or none for sensors without one) |
//! | `GET /v1/frames` (WebSocket) | track frames as they are made; filters below | read |
//! | `GET /v1/tracks` | the latest frame; filters below | read |
//! | `GET /v1/tracks/{id}` | one live track with its recent history (at most [`TRACK_HISTORY_LEN`](crate::pipeline::TRACK_HISTORY_LEN) points) | read |
//! | `GET /v1/sensors` | configuration and live health of every sensor | read |
//! | `GET /v1/detections` (WebSocket) | each accepted scan's detections in the site frame ([`crate::echo`]) | read |
//! | `GET /`, `GET /assets/*` | the live situation page ([`crate::page`]); it holds no data | none |
//! | `POST /v1/admin/sensors/{id}` | change P_D, clutter rate or noise from the next batch | admin |
//! | `GET /metrics` | Prometheus text format | none |
//! | `GET /healthz`, `GET /readyz` | liveness; readiness (503 while shutting down) | none |
//!
//! "read" accepts the read token or the admin token (as `Authorization: Bearer TOKEN`, or on a
//! WebSocket upgrade as the subprotocol `plotweave.bearer.HEX`, see [`crate::page`]); with no
//! read token configured these paths are open. Filters (query string, all optional, combined with AND, each applied per
//! track; `ended` is always complete): `sensor=ID[,ID...]` keeps tracks that one of these
//! sensors contributed to, `status=tentative|confirmed`, `bbox=xmin,ymin,xmax,ymax` (site
//! frame, m) keeps tracks whose position is inside.
//!
//! Every refusal is a JSON body `{"error": {"seq": null, "code": "...", "message": "..."}}`
//! with a status matching the code. Authorisation answers `401 unauthorized` when no valid
//! token is presented (none, a malformed header, a token that is no one's) and `403
//! forbidden` for a valid token of another role (a sensor's token on a read path, the read
//! token on admin or ingest); every refusal is counted in
//! `plotweave_auth_refusals_total{endpoint, reason}` ([`AuthReason`]).

use std::net::SocketAddr;

use axum::Router;
use axum::body::Bytes;
use axum::extract::rejection::QueryRejection;
use axum::extract::ws::{WebSocket, WebSocketUpgrade};
use axum::extract::{ConnectInfo, Path, Query, State};
use axum::http::{HeaderMap, StatusCode, header};
use axum::response::{IntoResponse, Response};
use axum::routing::{get, post};
use filter_core::tracker::{SensorKind, SensorParams, TrackStatus, TrackView};
use futures_util::StreamExt;
use serde::Deserialize;
use tokio::sync::oneshot;
use tracing::Instrument;

use crate::error::{Code, Rejection};
use crate::metrics::{AuthReason, CloseReason};
use crate::pipeline::Input;
use crate::server::{AppState, Principal, Role, frames_session, ingest_session, role_of};
use crate::wire::{self, TrackFilter};

/// The router of the whole HTTP surface.
pub fn app(state: AppState) -> Router {
    Router::new()
        .route("/v1/ingest", get(ingest))
        .route("/v1/frames", get(frames))
        .route("/v1/tracks", get(tracks))
        .route("/v1/tracks/{id}", get(track))
        .route("/v1/sensors", get(sensors))
        .route("/v1/admin/sensors/{id}", post(admin_sensor))
        .route("/metrics", get(metrics))
        .route("/healthz", get(healthz))
        .route("/readyz", get(readyz))
        .route("/v1/detections", get(crate::echo::detections))
        .merge(crate::page::router())
        .fallback(not_found)
        .with_state(state)
}

fn bad(message: impl Into<String>) -> Rejection {
    Rejection::new(Code::BadRequest, None, message)
}

/// The bearer token of a request: `Ok(None)` when there is no `Authorization` header.
fn bearer(headers: &HeaderMap) -> Result<Option<&str>, Rejection> {
    let Some(v) = headers.get(header::AUTHORIZATION) else {
        return Ok(None);
    };
    let malformed = || {
        Rejection::new(
            Code::Unauthorized,
            None,
            "Authorization header must be `Bearer TOKEN`",
        )
    };
    let v = v.to_str().map_err(|_| malformed())?;
    let token = v
        .strip_prefix("Bearer ")
        .or_else(|| v.strip_prefix("bearer "))
        .ok_or_else(malformed)?
        .trim();
    if token.is_empty() {
        return Err(malformed());
    }
    Ok(Some(token))
}

/// An authorisation refusal: why (the metric's `reason`) and the answer.
type Refusal = (AuthReason, Rejection);

/// Count refusal `r` on `endpoint` (one of [`crate::metrics::AUTH_ENDPOINTS`]) and return its
/// answer. The log line never carries the token, only the reason.
fn refused(state: &AppState, endpoint: &'static str, (reason, r): Refusal) -> Rejection {
    state.metrics().count_auth_refusal(endpoint, reason);
    tracing::debug!(
        endpoint,
        reason = reason.as_str(),
        code = %r.code,
        "authorisation refused"
    );
    r
}

fn malformed(r: Rejection) -> Refusal {
    (AuthReason::Malformed, r)
}

fn unauthorized(reason: AuthReason, message: &'static str) -> Refusal {
    (reason, Rejection::new(Code::Unauthorized, None, message))
}

fn forbidden(message: &'static str) -> Refusal {
    (
        AuthReason::WrongRole,
        Rejection::new(Code::Forbidden, None, message),
    )
}

/// Check the read token (or the admin token) for `endpoint`; open when no read token is set.
pub(crate) fn require_read(
    state: &AppState,
    headers: &HeaderMap,
    endpoint: &'static str,
) -> Result<(), Rejection> {
    let site = state.site();
    if site.server.read_token.is_none() {
        return Ok(());
    }
    let check = || -> Result<(), Refusal> {
        // Browsers cannot set headers on a WebSocket: they offer the token as a subprotocol.
        let offered = crate::page::protocol_token(headers).map_err(malformed)?;
        let token = bearer(headers)
            .map_err(malformed)?
            .or(offered.as_deref())
            .ok_or_else(|| {
                unauthorized(
                    AuthReason::MissingToken,
                    "this path requires the read token: Authorization: Bearer TOKEN",
                )
            })?;
        match role_of(site, token) {
            Role::Read | Role::Admin => Ok(()),
            Role::Sensor(_) => Err(forbidden(
                "this token is a sensor's ingest token; this path requires the read token",
            )),
            Role::Nobody => Err(unauthorized(
                AuthReason::UnknownToken,
                "the bearer token is not the read token",
            )),
        }
    };
    check().map_err(|r| refused(state, endpoint, r))
}

fn require_admin(state: &AppState, headers: &HeaderMap) -> Result<(), Rejection> {
    let site = state.site();
    if site.server.admin_token.is_none() {
        return Ok(());
    }
    let check = || -> Result<(), Refusal> {
        let token = bearer(headers).map_err(malformed)?.ok_or_else(|| {
            unauthorized(
                AuthReason::MissingToken,
                "this path requires the admin token: Authorization: Bearer TOKEN",
            )
        })?;
        match role_of(site, token) {
            Role::Admin => Ok(()),
            Role::Read | Role::Sensor(_) => Err(forbidden(
                "this token does not open /v1/admin/*; it requires the admin token",
            )),
            Role::Nobody => Err(unauthorized(
                AuthReason::UnknownToken,
                "the bearer token is not the admin token",
            )),
        }
    };
    check().map_err(|r| refused(state, "admin", r))
}

/// Who an ingest request speaks for, from its bearer token.
fn ingest_principal(state: &AppState, headers: &HeaderMap) -> Result<Principal, Rejection> {
    let site = state.site();
    let check = || -> Result<Principal, Refusal> {
        match bearer(headers).map_err(malformed)? {
            None => {
                if site.sensor_extra.iter().all(|e| e.token.is_some()) {
                    Err(unauthorized(
                        AuthReason::MissingToken,
                        "ingest requires a sensor token: Authorization: Bearer TOKEN",
                    ))
                } else {
                    Ok(Principal::Anonymous)
                }
            }
            Some(token) => match role_of(site, token) {
                Role::Sensor(i) => Ok(Principal::Sensor(i)),
                Role::Read | Role::Admin => Err(forbidden(
                    "this token does not open /v1/ingest; a sensor sends with its own token",
                )),
                Role::Nobody => Err(unauthorized(
                    AuthReason::UnknownToken,
                    "the bearer token is not the token of any configured sensor",
                )),
            },
        }
    };
    check().map_err(|r| refused(state, "ingest", r))
}

async fn ingest(
    State(state): State<AppState>,
    ConnectInfo(peer): ConnectInfo<SocketAddr>,
    headers: HeaderMap,
    ws: WebSocketUpgrade,
) -> Response {
    if state.cancel_token().is_cancelled() {
        return shutting_down().into_response();
    }
    let principal = match ingest_principal(&state, &headers) {
        Ok(p) => p,
        Err(r) => {
            tracing::info!(%peer, code = %r.code, "ingest connection refused");
            return r.into_response();
        }
    };
    let slot = match state.open_connection("ingest") {
        Ok(s) => s,
        Err(r) => return r.into_response(),
    };
    let max = state.site().server.limits.max_message_bytes;
    let who = match principal {
        Principal::Sensor(i) => state.site().sensors[i].id.clone(),
        Principal::Anonymous => "anonymous".to_string(),
    };
    let span = tracing::info_span!("ingest", conn = slot.id, %peer, principal = %who);
    let tasks = state.0.consumers.clone();
    ws.max_message_size(max)
        .max_frame_size(max)
        .on_upgrade(move |socket| {
            tasks.track_future(
                async move {
                    tracing::info!("connected");
                    let (sink, stream) = socket.split();
                    let metrics = state.0.metrics.clone();
                    let why = ingest_session(state, principal, sink, stream).await;
                    metrics.count_close("ingest", why);
                    drop(slot);
                    tracing::info!(reason = why.as_str(), "disconnected");
                }
                .instrument(span),
            )
        })
}

fn shutting_down() -> Rejection {
    Rejection::new(Code::ShuttingDown, None, "the service is shutting down")
}

/// Track filters of `/v1/frames` and `/v1/tracks` (see the module doc).
#[derive(Debug, Clone, Default, PartialEq)]
pub struct TrackQuery {
    sensors: Option<Vec<usize>>,
    status: Option<TrackStatus>,
    bbox: Option<[f64; 4]>,
}

impl TrackQuery {
    /// Whether no filter is set (every track is kept).
    pub fn is_empty(&self) -> bool {
        self.sensors.is_none() && self.status.is_none() && self.bbox.is_none()
    }

    /// Parse query pairs; `ids` are the configured sensor ids.
    pub fn parse(pairs: &[(String, String)], ids: &[String]) -> Result<Self, Rejection> {
        let mut q = TrackQuery::default();
        for (key, value) in pairs {
            match key.as_str() {
                "sensor" => {
                    let mut list = q.sensors.take().unwrap_or_default();
                    for id in value.split(',').filter(|s| !s.is_empty()) {
                        let i = ids.iter().position(|s| s == id).ok_or_else(|| {
                            bad(format!(
                                "sensor: {id:?} is not configured (configured: {})",
                                ids.join(", ")
                            ))
                        })?;
                        list.push(i);
                    }
                    q.sensors = Some(list);
                }
                "status" => {
                    q.status = Some(wire::parse_status(value).ok_or_else(|| {
                        bad(format!(
                            "status: must be \"tentative\" or \"confirmed\", got {value:?}"
                        ))
                    })?);
                }
                "bbox" => {
                    let parts: Vec<f64> = value
                        .split(',')
                        .map(|p| p.trim().parse::<f64>())
                        .collect::<Result<_, _>>()
                        .map_err(|_| {
                            bad(format!(
                                "bbox: must be four numbers xmin,ymin,xmax,ymax (m), got {value:?}"
                            ))
                        })?;
                    let [x0, y0, x1, y1] = parts[..] else {
                        return Err(bad(format!(
                            "bbox: must be four numbers xmin,ymin,xmax,ymax (m), got {value:?}"
                        )));
                    };
                    if !parts.iter().all(|v| v.is_finite()) || x0 > x1 || y0 > y1 {
                        return Err(bad(format!(
                            "bbox: needs finite numbers with xmin <= xmax and ymin <= ymax, got {value:?}"
                        )));
                    }
                    q.bbox = Some([x0, y0, x1, y1]);
                }
                other => {
                    return Err(bad(format!(
                        "unknown query parameter {other:?} (known: sensor, status, bbox)"
                    )));
                }
            }
        }
        Ok(q)
    }
}

impl TrackFilter for TrackQuery {
    fn keep(&self, t: &TrackView) -> bool {
        if let Some(s) = self.status
            && t.status != s
        {
            return false;
        }
        if let Some([x0, y0, x1, y1]) = self.bbox {
            let (x, y) = (t.state[0], t.state[1]);
            if !(x >= x0 && x <= x1 && y >= y0 && y <= y1) {
                return false;
            }
        }
        if let Some(list) = &self.sensors
            && !t.sensors.iter().any(|s| list.contains(&s))
        {
            return false;
        }
        true
    }
}

fn query(
    state: &AppState,
    q: Result<Query<Vec<(String, String)>>, QueryRejection>,
) -> Result<TrackQuery, Rejection> {
    let Query(pairs) = q.map_err(|e| bad(format!("query string: {e}")))?;
    TrackQuery::parse(&pairs, &state.0.ids)
}

async fn frames(
    State(state): State<AppState>,
    ConnectInfo(peer): ConnectInfo<SocketAddr>,
    headers: HeaderMap,
    q: Result<Query<Vec<(String, String)>>, QueryRejection>,
    ws: WebSocketUpgrade,
) -> Response {
    if let Err(r) = require_read(&state, &headers, "frames") {
        return r.into_response();
    }
    let filter = match query(&state, q) {
        Ok(f) => f,
        Err(r) => return r.into_response(),
    };
    // Subscribe before answering the upgrade: see `frames_session`.
    let rx = state.0.hub.subscribe();
    consumer_upgrade(state, peer, ws, "frames", move |state, socket| async move {
        let (sink, stream) = socket.split();
        frames_session(state, filter, rx, sink, stream).await
    })
}

/// Upgrade a read-only consumer (frames, detection echo): refuse during shutdown, take a
/// connection slot (`server.limits.max_connections`), then run `session` on the socket as a
/// tracked task inside a span named by `kind`, releasing the slot when it ends and counting
/// why it ended (`plotweave_connections_closed_total{endpoint=kind}`).
pub(crate) fn consumer_upgrade<F, Fut>(
    state: AppState,
    peer: SocketAddr,
    ws: WebSocketUpgrade,
    kind: &'static str,
    session: F,
) -> Response
where
    F: FnOnce(AppState, WebSocket) -> Fut + Send + 'static,
    Fut: std::future::Future<Output = CloseReason> + Send + 'static,
{
    if state.cancel_token().is_cancelled() {
        return shutting_down().into_response();
    }
    let slot = match state.open_connection(kind) {
        Ok(s) => s,
        Err(r) => return r.into_response(),
    };
    let span = tracing::info_span!("consumer", kind, conn = slot.id, %peer);
    let tasks = state.0.consumers.clone();
    ws.protocols([crate::page::WS_PROTOCOL])
        .on_upgrade(move |socket| {
            tasks.track_future(
                async move {
                    tracing::info!("subscribed");
                    let metrics = state.0.metrics.clone();
                    let why = session(state, socket).await;
                    metrics.count_close(kind, why);
                    drop(slot);
                    tracing::info!(reason = why.as_str(), "unsubscribed");
                }
                .instrument(span),
            )
        })
}

fn json(status: StatusCode, body: String) -> Response {
    (status, [(header::CONTENT_TYPE, "application/json")], body).into_response()
}

/// The frame shown before any batch was processed.
const EMPTY_PICTURE: &str = r#"{"time":null,"sensor":null,"seq":null,"tracks":[],"ended":[]}"#;

async fn tracks(
    State(state): State<AppState>,
    headers: HeaderMap,
    q: Result<Query<Vec<(String, String)>>, QueryRejection>,
) -> Result<Response, Rejection> {
    require_read(&state, &headers, "tracks")?;
    let filter = query(&state, q)?;
    let Some(latest) = state.0.hub.latest() else {
        return Ok(json(StatusCode::OK, EMPTY_PICTURE.to_string()));
    };
    if filter.is_empty() {
        return Ok(json(StatusCode::OK, latest.json.as_str().to_string()));
    }
    let mut out = String::new();
    wire::write_frame(&mut out, &latest.picture, &state.0.ids, &filter);
    Ok(json(StatusCode::OK, out))
}

async fn track(
    State(state): State<AppState>,
    headers: HeaderMap,
    Path(id): Path<String>,
) -> Result<Response, Rejection> {
    require_read(&state, &headers, "track")?;
    let id: u64 = id
        .parse()
        .map_err(|_| bad(format!("track id must be an unsigned integer, got {id:?}")))?;
    let not_live = || {
        Rejection::new(
            Code::NotFound,
            None,
            format!("track {id} is not live (it ended, or never existed)"),
        )
    };
    let latest = state.0.hub.latest().ok_or_else(not_live)?;
    let t = latest
        .picture
        .tracks
        .iter()
        .find(|t| t.id == id)
        .ok_or_else(not_live)?;
    let history = state.0.hub.history(id).unwrap_or_default();
    let mut out = String::from("{\"time\":");
    out.push_str(&serde_json::to_string(&latest.picture.time).unwrap_or_else(|_| "null".into()));
    out.push_str(",\"track\":");
    wire::write_track(&mut out, t, &state.0.ids);
    out.push_str(",\"history\":");
    out.push_str(&serde_json::to_string(&history).unwrap_or_else(|_| "[]".into()));
    out.push('}');
    Ok(json(StatusCode::OK, out))
}

async fn sensors(State(state): State<AppState>, headers: HeaderMap) -> Result<Response, Rejection> {
    require_read(&state, &headers, "sensors")?;
    let configs = state.0.hub.sensors();
    let health = state.0.hub.health();
    let gates: Vec<(Option<u64>, Option<f64>)> = {
        let a = state.0.admission.lock().await;
        (0..configs.len())
            .map(|i| (a.gate(i).last_seq, a.gate(i).last_time))
            .collect()
    };
    let site = state.site();
    let list: Vec<serde_json::Value> = configs
        .iter()
        .enumerate()
        .map(|(i, c)| {
            let (kind, noise) = match c.kind {
                SensorKind::Cartesian { sigma } => {
                    ("cartesian", serde_json::json!({"sigma": sigma}))
                }
                SensorKind::Polar {
                    x,
                    y,
                    sigma_range,
                    sigma_bearing_deg,
                    sigma_range_rate,
                } => (
                    "polar",
                    serde_json::json!({"range": sigma_range, "bearing_deg": sigma_bearing_deg,
                        "range_rate": sigma_range_rate, "position": {"x": x, "y": y}}),
                ),
            };
            serde_json::json!({
                "id": c.id,
                "kind": kind,
                "noise": noise,
                "detection_probability": c.detection_probability,
                "clutter_rate": c.clutter_rate,
                "birth_rate": c.birth_rate,
                "period": site.sensor_extra[i].period,
                "fov": crate::page::fov_json(&c.fov),
                "token_required": site.sensor_extra[i].token.is_some(),
                "last_seq": gates[i].0,
                "last_time": gates[i].1,
                "health": health.get(i),
            })
        })
        .collect();
    Ok(json(
        StatusCode::OK,
        serde_json::json!({ "site": site.name, "sensors": list }).to_string(),
    ))
}

/// Body of `POST /v1/admin/sensors/{id}`; every field optional, at least one required.
#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields)]
struct AdminBody {
    detection_probability: Option<f64>,
    clutter_rate: Option<f64>,
    noise: Option<AdminNoise>,
}

#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields)]
struct AdminNoise {
    sigma: Option<f64>,
    range: Option<f64>,
    bearing_deg: Option<f64>,
}

/// Check an admin body against sensor `kind` and turn it into core parameters.
fn admin_params(body: &[u8], kind: &SensorKind) -> Result<SensorParams, Rejection> {
    let mut de = serde_json::Deserializer::from_slice(body);
    let b: AdminBody = serde_path_to_error::deserialize(&mut de).map_err(|e| {
        let path = e.path().to_string();
        if path == "." {
            bad(format!("body: {}", e.inner()))
        } else {
            bad(format!("{path}: {}", e.inner()))
        }
    })?;
    let mut p = SensorParams {
        detection_probability: b.detection_probability,
        clutter_rate: b.clutter_rate,
        ..SensorParams::default()
    };
    if let Some(v) = b.detection_probability
        && !(v.is_finite() && v > 0.0 && v <= 1.0)
    {
        return Err(bad(format!(
            "detection_probability: must be in (0, 1], got {v}"
        )));
    }
    if let Some(v) = b.clutter_rate
        && !(v.is_finite() && v >= 0.0)
    {
        return Err(bad(format!(
            "clutter_rate: must be finite and >= 0 per scan, got {v}"
        )));
    }
    if let Some(n) = b.noise {
        for (key, v) in [
            ("sigma", n.sigma),
            ("range", n.range),
            ("bearing_deg", n.bearing_deg),
        ] {
            if let Some(v) = v
                && !(v.is_finite() && v > 0.0)
            {
                return Err(bad(format!("noise.{key}: must be finite and > 0, got {v}")));
            }
        }
        match kind {
            SensorKind::Cartesian { .. } => {
                if n.range.is_some() || n.bearing_deg.is_some() {
                    return Err(bad(
                        "noise: this sensor is cartesian; only noise.sigma (m) applies",
                    ));
                }
                p.sigma = n.sigma;
            }
            SensorKind::Polar { .. } => {
                if n.sigma.is_some() {
                    return Err(bad(
                        "noise: this sensor is polar; noise.range (m) and noise.bearing_deg apply",
                    ));
                }
                p.sigma_range = n.range;
                p.sigma_bearing_deg = n.bearing_deg;
            }
        }
    }
    if p == SensorParams::default() {
        return Err(bad(
            "body: nothing to change; give detection_probability, clutter_rate or noise",
        ));
    }
    Ok(p)
}

async fn admin_sensor(
    State(state): State<AppState>,
    headers: HeaderMap,
    Path(id): Path<String>,
    body: Bytes,
) -> Result<Response, Rejection> {
    require_admin(&state, &headers)?;
    let index = state.0.ids.iter().position(|s| *s == id).ok_or_else(|| {
        Rejection::new(
            Code::NotFound,
            None,
            format!(
                "sensor {id:?} is not configured (configured: {})",
                state.0.ids.join(", ")
            ),
        )
    })?;
    let current = state.0.hub.sensors()[index].kind;
    let params = admin_params(&body, &current)?;
    let tx = state.sender().ok_or_else(shutting_down)?;
    let (reply, answer) = oneshot::channel();
    tx.send(Input::UpdateSensor {
        sensor: index,
        params,
        reply,
    })
    .await
    .map_err(|_| shutting_down())?;
    let updated = answer
        .await
        .map_err(|_| shutting_down())?
        .map_err(|e| bad(e.to_string()))?;
    tracing::info!(
        sensor = %id,
        detection_probability = updated.detection_probability,
        clutter_rate = updated.clutter_rate,
        kind = ?updated.kind,
        "sensor parameters changed by admin; applied from the next batch"
    );
    Ok(json(
        StatusCode::OK,
        serde_json::json!({
            "sensor": id,
            "applied": "from the next batch",
            "detection_probability": updated.detection_probability,
            "clutter_rate": updated.clutter_rate,
            "noise": match updated.kind {
                SensorKind::Cartesian { sigma } => serde_json::json!({"sigma": sigma}),
                SensorKind::Polar { sigma_range, sigma_bearing_deg, .. } =>
                    serde_json::json!({"range": sigma_range, "bearing_deg": sigma_bearing_deg}),
            },
        })
        .to_string(),
    ))
}

async fn metrics(State(state): State<AppState>) -> Response {
    (
        [(header::CONTENT_TYPE, crate::metrics::CONTENT_TYPE)],
        state.metrics().encode(),
    )
        .into_response()
}

async fn healthz() -> &'static str {
    "ok\n"
}

async fn readyz(State(state): State<AppState>) -> Response {
    let done = *state.0.hub.done().borrow();
    if state.cancel_token().is_cancelled() || done {
        (StatusCode::SERVICE_UNAVAILABLE, "shutting down\n").into_response()
    } else {
        (StatusCode::OK, "ready\n").into_response()
    }
}

async fn not_found() -> Rejection {
    Rejection::new(
        Code::NotFound,
        None,
        "no such path (see the HTTP surface in docs/wire.md)",
    )
}

#[cfg(test)]
mod tests {
    use super::*;
    use axum::body::Body;
    use axum::http::Request;
    use tower::ServiceExt;

    fn state(admin: Option<&str>) -> AppState {
        let mut site = crate::config::Site::demo(|_| None).unwrap();
        site.server.admin_token = admin.map(crate::config::Secret::new);
        AppState::new(site).unwrap()
    }

    async fn call(app: &Router, req: Request<Body>) -> (StatusCode, String) {
        let resp = app.clone().oneshot(req).await.unwrap();
        let status = resp.status();
        let body = axum::body::to_bytes(resp.into_body(), 1 << 20)
            .await
            .unwrap();
        (status, String::from_utf8(body.to_vec()).unwrap())
    }

    fn get(path: &str) -> Request<Body> {
        Request::get(path).body(Body::empty()).unwrap()
    }

    #[tokio::test]
    async fn probes_metrics_and_the_empty_picture() {
        let app = app(state(None));
        assert_eq!(
            call(&app, get("/healthz")).await,
            (StatusCode::OK, "ok\n".into())
        );
        assert_eq!(call(&app, get("/readyz")).await.0, StatusCode::OK);
        let (status, body) = call(&app, get("/metrics")).await;
        assert_eq!(status, StatusCode::OK);
        assert!(body.contains("plotweave_batches_received_total{sensor=\"kestrel-radar\"} 0"));
        let (status, body) = call(&app, get("/v1/tracks")).await;
        assert_eq!((status, body.as_str()), (StatusCode::OK, EMPTY_PICTURE));
        let (status, body) = call(&app, get("/v1/nowhere")).await;
        assert_eq!(status, StatusCode::NOT_FOUND);
        assert!(body.contains("\"not_found\""));
        let (status, body) = call(&app, get("/v1/tracks?colour=red")).await;
        assert_eq!(status, StatusCode::BAD_REQUEST);
        assert!(
            body.contains("unknown query parameter \\\"colour\\\""),
            "{body}"
        );
    }

    #[tokio::test]
    async fn admin_change_goes_through_the_engine() {
        let s = state(Some("admin-token-0123456789"));
        let app = app(s.clone());
        let post = |token: Option<&str>, body: &str| {
            let mut r = Request::post("/v1/admin/sensors/north-mole-camera");
            if let Some(t) = token {
                r = r.header("authorization", format!("Bearer {t}"));
            }
            r.body(Body::from(body.to_string())).unwrap()
        };
        assert_eq!(
            call(&app, post(None, "{}")).await.0,
            StatusCode::UNAUTHORIZED
        );
        // A token that is no one's is 401 (docs/wire.md, error codes); 403 is for a valid
        // token of another role, checked end to end in tests/tests/access.rs.
        assert_eq!(
            call(&app, post(Some("wrong-token-0123456789"), "{}"))
                .await
                .0,
            StatusCode::UNAUTHORIZED
        );
        let (status, body) = call(
            &app,
            post(
                Some("admin-token-0123456789"),
                r#"{"noise": {"range": 3.0}}"#,
            ),
        )
        .await;
        assert_eq!(status, StatusCode::BAD_REQUEST);
        assert!(body.contains("this sensor is cartesian"), "{body}");
        let (status, body) = call(
            &app,
            post(
                Some("admin-token-0123456789"),
                r#"{"detection_probability": 0.6, "noise": {"sigma": 6.5}}"#,
            ),
        )
        .await;
        assert_eq!(status, StatusCode::OK, "{body}");
        assert_eq!(s.0.hub.sensors()[1].detection_probability, 0.6);
        assert_eq!(
            s.0.hub.sensors()[1].kind,
            SensorKind::Cartesian { sigma: 6.5 }
        );
    }

    #[test]
    fn track_query_parsing() {
        let ids = vec!["a".to_string(), "b".to_string()];
        let pairs = |v: &[(&str, &str)]| -> Vec<(String, String)> {
            v.iter()
                .map(|(k, v)| (k.to_string(), v.to_string()))
                .collect()
        };
        let q = TrackQuery::parse(
            &pairs(&[
                ("sensor", "b,a"),
                ("status", "confirmed"),
                ("bbox", "-1,-2,3,4"),
            ]),
            &ids,
        )
        .unwrap();
        assert_eq!(
            q,
            TrackQuery {
                sensors: Some(vec![1, 0]),
                status: Some(TrackStatus::Confirmed),
                bbox: Some([-1.0, -2.0, 3.0, 4.0]),
            }
        );
        assert!(TrackQuery::parse(&[], &ids).unwrap().is_empty());
        for (k, v, fragment) in [
            ("sensor", "c", "\"c\" is not configured"),
            ("status", "lost", "status: must be"),
            ("bbox", "1,2,3", "bbox: must be four numbers"),
            ("bbox", "3,0,1,1", "xmin <= xmax"),
            ("bbox", "0,0,inf,1", "finite"),
        ] {
            let e = TrackQuery::parse(&pairs(&[(k, v)]), &ids).unwrap_err();
            assert!(e.message.contains(fragment), "{k}={v}: {}", e.message);
        }
    }
}
