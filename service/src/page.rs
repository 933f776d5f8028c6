//! The live situation page at `GET /`: a hand-written HTML + JS + CSS page (one `<canvas>`),
//! embedded in the binary with `include_str!`, that draws the site picture live from
//! `/v1/frames`, `/v1/detections`, `/v1/sensors`, `/v1/tracks/{id}` and `/metrics`. No CDN, no
//! build step; why, and what the page shows, is in `docs/page.md`.
//!
//! The page itself carries no data and needs no token. The data paths keep their
//! authorisation: the page sends the read token as `Authorization: Bearer` on HTTP requests,
//! and, because a browser's `WebSocket` cannot set headers, offers it on WebSocket upgrades as
//! the subprotocol `plotweave.bearer.HEX` (the token's UTF-8 bytes in hexadecimal, so any
//! token fits the subprotocol grammar) next to [`WS_PROTOCOL`], which the server selects; the
//! token is never echoed back, never put in a URL the server sees, and never logged. The page
//! takes the token from a `?token=` parameter of its own address (then removes it from the
//! address bar) or from its input field, and keeps it in the tab's `sessionStorage` only.

use axum::Router;
use axum::http::{HeaderMap, HeaderValue, header};
use axum::response::{IntoResponse, Response};
use axum::routing::get;
use filter_core::tracker::FieldOfView;

use crate::error::{Code, Rejection};
use crate::server::AppState;

/// The page's HTML.
pub const INDEX_HTML: &str = include_str!("../assets/index.html");
/// The page's script.
pub const PAGE_JS: &str = include_str!("../assets/page.js");
/// The page's style sheet.
pub const PAGE_CSS: &str = include_str!("../assets/page.css");

/// The WebSocket subprotocol the server selects on `/v1/frames` and `/v1/detections` when a
/// client offers it (a browser that offers any subprotocol requires one to be selected).
pub const WS_PROTOCOL: &str = "plotweave.v1";

/// Prefix of the subprotocol that carries a bearer token: `plotweave.bearer.` + hex(token).
pub const BEARER_PROTOCOL_PREFIX: &str = "plotweave.bearer.";

/// Content-Security-Policy of the page: only its own script, style and connections.
const CSP: &str = "default-src 'none'; script-src 'self'; style-src 'self'; connect-src 'self'; \
                   img-src 'self' data:; base-uri 'none'; form-action 'none'; frame-ancestors 'none'";

/// The routes of the page (merged into [`crate::http::app`]).
pub fn router() -> Router<AppState> {
    Router::new()
        .route(
            "/",
            get(|| async { asset("text/html; charset=utf-8", INDEX_HTML) }),
        )
        .route(
            "/assets/page.js",
            get(|| async { asset("text/javascript; charset=utf-8", PAGE_JS) }),
        )
        .route(
            "/assets/page.css",
            get(|| async { asset("text/css; charset=utf-8", PAGE_CSS) }),
        )
}

fn asset(content_type: &'static str, body: &'static str) -> Response {
    let mut r = body.into_response();
    let h = r.headers_mut();
    h.insert(header::CONTENT_TYPE, HeaderValue::from_static(content_type));
    h.insert(header::CACHE_CONTROL, HeaderValue::from_static("no-cache"));
    h.insert(
        header::CONTENT_SECURITY_POLICY,
        HeaderValue::from_static(CSP),
    );
    h.insert(
        header::X_CONTENT_TYPE_OPTIONS,
        HeaderValue::from_static("nosniff"),
    );
    // The page's own address may carry `?token=`: never send it on as a referrer.
    h.insert(
        header::REFERRER_POLICY,
        HeaderValue::from_static("no-referrer"),
    );
    r
}

/// The token offered as a `plotweave.bearer.HEX` subprotocol, if any.
///
/// Errors (401) when such an entry is there but HEX is not an even number of hexadecimal
/// digits encoding UTF-8; the message never contains the token.
pub(crate) fn protocol_token(headers: &HeaderMap) -> Result<Option<String>, Rejection> {
    for value in headers.get_all(header::SEC_WEBSOCKET_PROTOCOL) {
        let Ok(value) = value.to_str() else {
            continue;
        };
        for entry in value.split(',').map(str::trim) {
            if let Some(hex) = entry.strip_prefix(BEARER_PROTOCOL_PREFIX) {
                return decode_hex_token(hex).map(Some).ok_or_else(|| {
                    Rejection::new(
                        Code::Unauthorized,
                        None,
                        "Sec-WebSocket-Protocol: plotweave.bearer. must be followed by the token's UTF-8 bytes as hexadecimal digits (two per byte)",
                    )
                });
            }
        }
    }
    Ok(None)
}

fn decode_hex_token(hex: &str) -> Option<String> {
    if hex.is_empty() || hex.len() % 2 != 0 {
        return None;
    }
    let digit = |c: u8| (c as char).to_digit(16).map(|d| d as u8);
    let bytes: Option<Vec<u8>> = hex
        .as_bytes()
        .chunks(2)
        .map(|p| Some(digit(p[0])? << 4 | digit(p[1])?))
        .collect();
    String::from_utf8(bytes?).ok()
}

/// A field of view as JSON for `GET /v1/sensors` (`shape` is `rect` or `sector`; metres,
/// degrees clockwise from north).
pub fn fov_json(fov: &FieldOfView) -> serde_json::Value {
    match *fov {
        FieldOfView::Rect {
            x_min,
            x_max,
            y_min,
            y_max,
        } => serde_json::json!({"shape": "rect", "x_min": x_min, "x_max": x_max,
            "y_min": y_min, "y_max": y_max}),
        FieldOfView::Sector {
            min_range,
            max_range,
            bearing_start_deg,
            bearing_extent_deg,
        } => serde_json::json!({"shape": "sector", "min_range": min_range,
            "max_range": max_range, "bearing_start_deg": bearing_start_deg,
            "bearing_extent_deg": bearing_extent_deg}),
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use axum::body::Body;
    use axum::http::{Request, StatusCode};
    use tower::ServiceExt;

    fn offered(values: &[&str]) -> HeaderMap {
        let mut h = HeaderMap::new();
        for v in values {
            h.append(header::SEC_WEBSOCKET_PROTOCOL, v.parse().unwrap());
        }
        h
    }

    #[test]
    fn bearer_subprotocol_decoding() {
        // "read-token" in UTF-8 is 72 65 61 64 2d 74 6f 6b 65 6e (ASCII table).
        let h = offered(&["plotweave.v1, plotweave.bearer.726561642d746f6b656e"]);
        assert_eq!(protocol_token(&h).unwrap().as_deref(), Some("read-token"));
        // Separate header lines, upper-case digits; "é" is C3 A9 in UTF-8.
        let h = offered(&["plotweave.v1", "plotweave.bearer.C3A9"]);
        assert_eq!(protocol_token(&h).unwrap().as_deref(), Some("é"));
        assert_eq!(protocol_token(&offered(&["plotweave.v1"])).unwrap(), None);
        assert_eq!(protocol_token(&HeaderMap::new()).unwrap(), None);
        for bad in [
            "plotweave.bearer.",
            "plotweave.bearer.abc",
            "plotweave.bearer.zz",
            "plotweave.bearer.ff",
        ] {
            let e = protocol_token(&offered(&[bad])).unwrap_err();
            assert_eq!(e.code, Code::Unauthorized, "{bad}");
            assert!(e.message.contains("hexadecimal digits"), "{}", e.message);
        }
    }

    #[tokio::test]
    async fn the_page_and_its_assets_are_served_with_a_strict_policy() {
        let state = AppState::new(crate::config::Site::demo(|_| None).unwrap()).unwrap();
        let app = crate::http::app(state);
        for (path, ty, fragment) in [
            ("/", "text/html", "id=\"confirmed-count\""),
            ("/assets/page.js", "text/javascript", "/v1/detections"),
            ("/assets/page.css", "text/css", "#side"),
        ] {
            let resp = app
                .clone()
                .oneshot(Request::get(path).body(Body::empty()).unwrap())
                .await
                .unwrap();
            assert_eq!(resp.status(), StatusCode::OK, "{path}");
            let h = resp.headers();
            assert!(h[header::CONTENT_TYPE].to_str().unwrap().starts_with(ty));
            assert!(
                h[header::CONTENT_SECURITY_POLICY]
                    .to_str()
                    .unwrap()
                    .contains("script-src 'self'")
            );
            assert_eq!(h[header::REFERRER_POLICY], "no-referrer");
            let body = axum::body::to_bytes(resp.into_body(), 1 << 20)
                .await
                .unwrap();
            assert!(
                String::from_utf8_lossy(&body).contains(fragment),
                "{path} lacks {fragment}"
            );
        }
    }

    #[test]
    fn fov_json_names_the_shape() {
        let site = crate::config::Site::demo(|_| None).unwrap();
        let radar = fov_json(&site.sensors[0].fov);
        assert_eq!(radar["shape"], "sector");
        assert_eq!(radar["max_range"], 6000.0);
        let camera = fov_json(&site.sensors[1].fov);
        assert_eq!(camera["shape"], "rect");
        assert_eq!(camera["y_max"], 2400.0);
    }
}
