//! Liveness of WebSocket peers: the server's own Pings and the idle timeout that closes a
//! half-open connection ([`Keepalive`]), shared by the ingest, frames and detections sessions.
//!
//! A peer that vanished without a TCP reset (a sensor whose uplink died, a laptop that went to
//! sleep, a NAT that forgot the mapping) leaves a connection that looks open forever: its slot
//! of `server.limits.max_connections` stays taken and `plotweave_connections` keeps counting
//! it. So every `server.limits.ping_interval` seconds the session sends a Ping; a live peer's
//! WebSocket layer answers with a Pong (tokio-tungstenite, browsers and every RFC 6455 client
//! do this by themselves while they read). Anything received, Pong or message, is proof of
//! life; a session that **listened** for `server.limits.idle_timeout` seconds and heard nothing
//! closes the connection and counts it in
//! `plotweave_connections_closed_total{reason="idle_timeout"}`. A send the peer does not take
//! within the same time (its TCP window stays shut because it stopped reading) closes it too
//! (`reason="send_timeout"`): a session blocked in a send would otherwise never see its idle
//! deadline.
//!
//! **Time spent paused by back-pressure does not count as silence.** When the engine queue is
//! full an ingest session deliberately stops reading its socket (it waits inside
//! [`crate::server::AppState::submit`] for room), so that TCP slows the sensor down. While it
//! does not read it cannot see Pongs, and reading them anyway would mean reading (and
//! buffering) the sensor's next batches, which is exactly what back-pressure must not do. So
//! the idle clock runs only while the session waits for the peer: the session calls
//! [`Keepalive::heard`] when it goes back to reading after handling a message, which gives the
//! peer a full `idle_timeout` from the end of the pause. A peer that died during the pause is
//! still caught, one `idle_timeout` after the pause ends; the Pongs of a live one are waiting
//! in the socket and are read at once.

use std::time::Duration;

use axum::extract::ws::{CloseFrame, Message, Utf8Bytes, close_code};
use futures_util::{Sink, SinkExt};
use tokio::time::{Instant, Interval, MissedTickBehavior};

use crate::config::Limits;
use crate::metrics::CloseReason;

/// How long the close frame to a peer found dead may take to send before the socket is
/// dropped without it.
pub const DEAD_PEER_CLOSE_LIMIT: Duration = Duration::from_secs(1);

/// What [`Keepalive::due`] says is to be done.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub(crate) enum Due {
    /// Time to send a Ping.
    Ping,
    /// Nothing was heard for `idle_timeout`: close the connection.
    Idle,
}

/// The ping clock and idle deadline of one WebSocket session (see the module doc).
pub(crate) struct Keepalive {
    ping: Option<Interval>,
    idle: Option<Duration>,
    deadline: Instant,
}

impl Keepalive {
    /// The clock of a session starting now, from `server.limits.ping_interval` and
    /// `idle_timeout` (0 turns either off).
    pub(crate) fn new(limits: &Limits) -> Self {
        let secs = |v: f64| (v > 0.0 && v.is_finite()).then(|| Duration::from_secs_f64(v));
        let ping = secs(limits.ping_interval).map(|period| {
            let mut i = tokio::time::interval_at(Instant::now() + period, period);
            // After a pause (back-pressure, a slow send) send one Ping, not a burst.
            i.set_missed_tick_behavior(MissedTickBehavior::Delay);
            i
        });
        let idle = secs(limits.idle_timeout);
        Keepalive {
            ping,
            idle,
            deadline: Instant::now() + idle.unwrap_or(Duration::ZERO),
        }
    }

    /// The peer was heard from (any message, a Pong included), or the session goes back to
    /// listening after it stopped reading on purpose: the peer has a full `idle_timeout` again.
    pub(crate) fn heard(&mut self) {
        if let Some(idle) = self.idle {
            self.deadline = Instant::now() + idle;
        }
    }

    /// Completes when a Ping is due or the idle deadline has passed; never when both are off.
    /// Cancel-safe: use it as a `select!` branch.
    pub(crate) async fn due(&mut self) -> Due {
        let Keepalive {
            ping,
            idle,
            deadline,
        } = self;
        let idle = async {
            match idle {
                Some(_) => tokio::time::sleep_until(*deadline).await,
                None => std::future::pending().await,
            }
        };
        let ping = async {
            match ping {
                Some(i) => {
                    i.tick().await;
                }
                None => std::future::pending().await,
            }
        };
        tokio::select! {
            biased;
            () = idle => Due::Idle,
            () = ping => Due::Ping,
        }
    }

    /// Send `msg`, giving up after `idle_timeout` (`SendTimeout`); a failed send is `Peer`.
    pub(crate) async fn send<S>(&self, sink: &mut S, msg: Message) -> Result<(), CloseReason>
    where
        S: Sink<Message> + Unpin,
    {
        let sent = match self.idle {
            None => sink.send(msg).await,
            Some(limit) => tokio::time::timeout(limit, sink.send(msg))
                .await
                .map_err(|_| CloseReason::SendTimeout)?,
        };
        sent.map_err(|_| CloseReason::Peer)
    }

    /// Send a Ping (empty payload).
    pub(crate) async fn ping<S>(&self, sink: &mut S) -> Result<(), CloseReason>
    where
        S: Sink<Message> + Unpin,
    {
        self.send(sink, Message::Ping(Default::default())).await
    }

    /// Act on what [`Keepalive::due`] returned: send the Ping, or report the idle timeout.
    /// `Err` is why the session must end.
    pub(crate) async fn act<S>(&self, due: Due, sink: &mut S) -> Result<(), CloseReason>
    where
        S: Sink<Message> + Unpin,
    {
        match due {
            Due::Ping => self.ping(sink).await,
            Due::Idle => Err(CloseReason::IdleTimeout),
        }
    }
}

/// End a session whose peer is gone or unresponsive: for a timeout, try (for at most
/// [`DEAD_PEER_CLOSE_LIMIT`]) to send a close frame (1001, naming the setting) so that a peer
/// that is merely slow learns why; then return `reason` so the caller counts it and drops the
/// socket. There is no close handshake: the peer is not expected to answer.
pub(crate) async fn give_up<S>(sink: &mut S, reason: CloseReason) -> CloseReason
where
    S: Sink<Message> + Unpin,
{
    let text = match reason {
        CloseReason::IdleTimeout => "nothing received within server.limits.idle_timeout",
        CloseReason::SendTimeout => "messages not taken within server.limits.idle_timeout",
        _ => return reason,
    };
    tracing::info!(
        reason = reason.as_str(),
        "closing an unresponsive connection"
    );
    let frame = Message::Close(Some(CloseFrame {
        code: close_code::AWAY,
        reason: Utf8Bytes::from_static(text),
    }));
    let _ = tokio::time::timeout(DEAD_PEER_CLOSE_LIMIT, sink.send(frame)).await;
    reason
}

#[cfg(test)]
mod tests {
    use super::*;

    fn limits(ping: f64, idle: f64) -> Limits {
        Limits {
            ping_interval: ping,
            idle_timeout: idle,
            ..Limits::default()
        }
    }

    #[tokio::test(start_paused = true)]
    async fn pings_on_the_interval_and_gives_up_after_idle_timeout() {
        let start = Instant::now();
        let mut k = Keepalive::new(&limits(1.0, 2.5));
        let mut seen = Vec::new();
        loop {
            let d = k.due().await;
            seen.push((d, (Instant::now() - start).as_secs_f64()));
            if d == Due::Idle {
                break;
            }
        }
        assert_eq!(
            seen,
            vec![(Due::Ping, 1.0), (Due::Ping, 2.0), (Due::Idle, 2.5)]
        );
    }

    #[tokio::test(start_paused = true)]
    async fn hearing_from_the_peer_moves_the_deadline() {
        let start = Instant::now();
        let mut k = Keepalive::new(&limits(1.0, 2.5));
        let mut idle_at = None;
        while idle_at.is_none() {
            match k.due().await {
                // The peer answers every Ping, until the third.
                Due::Ping if Instant::now() - start < Duration::from_secs(3) => k.heard(),
                Due::Ping => {}
                Due::Idle => idle_at = Some((Instant::now() - start).as_secs_f64()),
            }
        }
        // Last heard at 2 s (the second Ping's answer): closed at 2 + 2.5 s.
        assert_eq!(idle_at, Some(4.5));
    }

    #[tokio::test(start_paused = true)]
    async fn both_off_means_never_due() {
        let mut k = Keepalive::new(&limits(0.0, 0.0));
        let r = tokio::time::timeout(Duration::from_secs(86_400), k.due()).await;
        assert!(r.is_err());
    }
}
