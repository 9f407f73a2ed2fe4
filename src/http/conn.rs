//! The accept loop: connections, their limits, and their graceful end.
//!
//! `axum::serve` has no header or idle timeout, so slow or stalled clients could pin
//! connections forever. Each listener here runs hyper's HTTP/1 connection directly:
//!
//! - **Slow headers and idle keep-alive** (`server.header_timeout_ms`): hyper's header read
//!   timeout, which runs from the moment the connection opens and again from the end of each
//!   response, so one limit closes both a slowloris client trickling header bytes and a
//!   keep-alive connection that never sends its next request.
//! - **Stalled bodies** (`server.body_timeout_ms`): enforced by the handlers, which read bodies
//!   under the limit (408 `body_timeout`).
//! - **Connection count** (`server.max_connections`): a semaphore taken before `accept`, so past
//!   the limit new connections wait in the kernel's backlog instead of costing a task each.
//!
//! On shutdown the loop stops accepting and every open connection finishes its in-flight
//! request (an open stream runs to its end), then closes instead of keeping alive.

use std::sync::Arc;
use std::time::Duration;

use axum::Router;
use hyper_util::rt::{TokioIo, TokioTimer};
use hyper_util::server::graceful::GracefulShutdown;
use hyper_util::service::TowerToHyperService;
use tokio::net::TcpListener;
use tokio::sync::Semaphore;

use crate::serve::shutdown::Shutdown;

/// Per-connection limits, fixed at start.
#[derive(Debug, Clone, Copy)]
pub struct ConnLimits {
    /// Slow-header and keep-alive idle limit.
    pub header_timeout: Duration,
    /// Open connections on this listener.
    pub max_connections: usize,
}

/// Pause after an accept error that is not the peer's fault (out of file descriptors, say),
/// so the loop does not spin; the connections already open keep being served meanwhile.
const ACCEPT_BACKOFF: Duration = Duration::from_millis(50);

/// Serves `router` on `listener` until `shutdown` starts, then drains.
pub async fn serve_listener(listener: TcpListener, router: Router, limits: ConnLimits, shutdown: Shutdown) {
    let graceful = GracefulShutdown::new();
    let open = Arc::new(Semaphore::new(limits.max_connections));
    let mut http = hyper::server::conn::http1::Builder::new();
    http.timer(TokioTimer::new()).header_read_timeout(limits.header_timeout).keep_alive(true);
    let stop = shutdown.started();
    tokio::pin!(stop);
    loop {
        let permit = tokio::select! {
            () = &mut stop => break,
            p = open.clone().acquire_owned() => match p {
                Ok(p) => p,
                Err(_) => break,
            },
        };
        let stream = tokio::select! {
            () = &mut stop => break,
            accepted = listener.accept() => match accepted {
                Ok((stream, _peer)) => stream,
                Err(e) => {
                    if !is_peer_error(&e) {
                        tracing::warn!(error = %e, "accept failed; retrying");
                        tokio::time::sleep(ACCEPT_BACKOFF).await;
                    }
                    continue;
                }
            },
        };
        let _ = stream.set_nodelay(true);
        let service = TowerToHyperService::new(router.clone());
        let conn = graceful.watch(http.serve_connection(TokioIo::new(stream), service));
        tokio::spawn(async move {
            let _permit = permit;
            if let Err(e) = conn.await {
                // Timeouts, resets and malformed HTTP end here; hyper has answered what it could.
                tracing::debug!(error = %e, "connection ended with an error");
            }
        });
    }
    drop(listener);
    graceful.shutdown().await;
}

/// Accept errors caused by one peer (it reset before we accepted); nothing to back off from.
fn is_peer_error(e: &std::io::Error) -> bool {
    use std::io::ErrorKind::{ConnectionAborted, ConnectionRefused, ConnectionReset};
    matches!(e.kind(), ConnectionAborted | ConnectionRefused | ConnectionReset)
}
