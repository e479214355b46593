//! The server loop: accept on a listener until a shutdown signal, then drain: readiness
//! answers 503 and new work is refused while the listener stays open (so probes see the
//! drain), until the running jobs end; then the listener closes and open connections
//! finish. When the grace time ends first, the loop returns anyway and logs the jobs it
//! abandons; the caller exits without waiting for their threads.

use super::app::app;
use super::state::AppState;
use axum::serve::ListenerExt;
use std::future::{Future, IntoFuture};
use std::sync::Arc;
use tokio::net::TcpListener;
use tokio::sync::Notify;

/// Serve `state`'s app on `listener` until `shutdown` resolves and the running requests
/// end (or the configured grace time passes, whichever is first).
pub async fn serve(
    listener: TcpListener,
    state: AppState,
    shutdown: impl Future<Output = ()> + Send + 'static,
) -> std::io::Result<()> {
    let grace = state.config().shutdown_grace;
    let fired = Arc::new(Notify::new());
    let signal = {
        let fired = fired.clone();
        let state = state.clone();
        async move {
            shutdown.await;
            state.set_ready(false);
            tracing::info!(
                grace_secs = grace.as_secs_f64(),
                "shutting down: readiness 503 and no new work; running requests may finish"
            );
            fired.notify_one();
            // Keep accepting while jobs run: a load balancer's readiness probe must see
            // the 503, and new work gets a 503 rather than a refused connection.
            while state.jobs_running() > 0 {
                tokio::time::sleep(DRAIN_POLL).await;
            }
        }
    };
    // Small answers should leave at once rather than wait for Nagle's timer.
    let listener = listener.tap_io(|tcp| {
        let _ = tcp.set_nodelay(true);
    });
    let server = axum::serve(listener, app(state.clone()))
        .with_graceful_shutdown(signal)
        .into_future();
    tokio::select! {
        r = server => r,
        () = async { fired.notified().await; tokio::time::sleep(grace).await } => {
            let abandoned = state.running_jobs();
            tracing::warn!(
                jobs = state.jobs_running(),
                abandoned = %abandoned.join("; "),
                "shutdown grace time passed; abandoning the requests still running"
            );
            Ok(())
        }
    }
}

/// How often a draining server looks whether its jobs have ended.
const DRAIN_POLL: std::time::Duration = std::time::Duration::from_millis(20);

/// Resolves on SIGINT (Ctrl-C) or, on Unix, SIGTERM.
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
        () = ctrl_c => {},
        () = term => {},
    }
}
