//! Shutdown: the signal future and the token background work listens to.
//!
//! [`signal`] resolves on SIGINT or SIGTERM. [`Shutdown`] is a cheap clonable token over a
//! `watch` channel: the server hands one to every listener's graceful-shutdown future and flips it
//! once, so all listeners stop accepting together and drain their in-flight requests.

use tokio::sync::watch;

/// Resolves when the process receives SIGINT (Ctrl-C) or, on Unix, SIGTERM.
pub async fn signal() {
    let ctrl_c = async {
        // If the handler cannot be installed, never resolve rather than shut down at once.
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
        () = ctrl_c => tracing::info!("SIGINT received; draining"),
        () = term => tracing::info!("SIGTERM received; draining"),
    }
}

/// The sending side: call [`Trigger::fire`] once to start shutdown.
#[derive(Debug)]
pub struct Trigger(watch::Sender<bool>);

/// The listening side; clone freely.
#[derive(Debug, Clone)]
pub struct Shutdown(watch::Receiver<bool>);

/// A connected trigger and token.
#[must_use]
pub fn channel() -> (Trigger, Shutdown) {
    let (tx, rx) = watch::channel(false);
    (Trigger(tx), Shutdown(rx))
}

impl Trigger {
    /// Starts shutdown; idempotent.
    pub fn fire(&self) {
        self.0.send_replace(true);
    }
}

impl Shutdown {
    /// True once shutdown has started.
    #[must_use]
    pub fn is_started(&self) -> bool {
        *self.0.borrow()
    }

    /// Resolves once shutdown has started (at once if it already has, or if the trigger is gone).
    pub async fn started(mut self) {
        let _ = self.0.wait_for(|&s| s).await;
    }
}
