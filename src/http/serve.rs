//! The server loop: accept on a listener until a shutdown signal, then drain: readiness
//! answers 503 and new work is refused while the listener stays open (so probes see the
//! drain), until the running jobs end; then the listener closes and open connections
//! finish. When the grace time ends first, the loop returns anyway and logs the jobs it
//! abandons; the caller exits without waiting for their threads.
//!
//! Each connection is served by hyper's HTTP/1 connection with a header-read timeout
//! (`ServerConfig::socket_idle`): a client that opens a socket and sends a request head
//! slowly or not at all (slowloris) is cut off, and the same timer runs while a kept-alive
//! socket waits for its next request, so idle sockets are closed too. Without it, idle
//! sockets pile up until the process runs out of file descriptors and even `/healthz`
//! times out. The timer does not run while a request's body or its answer is under way.

use super::app::app;
use super::state::AppState;
use hyper_util::rt::{TokioIo, TokioTimer};
use hyper_util::server::graceful::GracefulShutdown;
use hyper_util::service::TowerToHyperService;
use std::future::Future;
use std::time::Duration;
use tokio::net::TcpListener;
use tokio::time::Instant;

/// Pause after a failed accept (out of file descriptors, say) before the next one, so
/// the loop does not spin while the condition lasts.
const ACCEPT_BACKOFF: Duration = Duration::from_millis(50);

/// How often a draining server looks whether its jobs have ended.
const DRAIN_POLL: Duration = Duration::from_millis(20);

/// Serve `state`'s app on `listener` until `shutdown` resolves and the running requests
/// end (or the configured grace time passes, whichever is first).
pub async fn serve(
    listener: TcpListener,
    state: AppState,
    shutdown: impl Future<Output = ()> + Send + 'static,
) -> std::io::Result<()> {
    let grace = state.config().shutdown_grace;
    let idle = state.config().socket_idle;
    let router = app(state.clone());
    let mut http = hyper::server::conn::http1::Builder::new();
    http.timer(TokioTimer::new())
        .header_read_timeout(idle)
        .keep_alive(true);
    let graceful = GracefulShutdown::new();
    tokio::pin!(shutdown);
    // When the grace time ends, once the signal has come.
    let mut until: Option<Instant> = None;
    loop {
        let accepted = match until {
            None => tokio::select! {
                accepted = listener.accept() => accepted,
                () = &mut shutdown => {
                    state.set_ready(false);
                    tracing::info!(
                        grace_secs = grace.as_secs_f64(),
                        "shutting down: readiness 503 and no new work; running requests may finish"
                    );
                    until = Some(Instant::now() + grace);
                    continue;
                }
            },
            Some(end) => {
                // Draining: keep accepting while jobs run, so a load balancer's readiness
                // probe sees the 503 and new work gets a 503 rather than a refused
                // connection.
                if state.jobs_running() == 0 {
                    break;
                }
                if Instant::now() >= end {
                    abandon(&state);
                    return Ok(());
                }
                tokio::select! {
                    accepted = listener.accept() => accepted,
                    () = tokio::time::sleep(DRAIN_POLL) => continue,
                }
            }
        };
        let tcp = match accepted {
            Ok((tcp, _peer)) => tcp,
            Err(e) => {
                tracing::warn!(error = %e, "accept failed; trying again shortly");
                tokio::time::sleep(ACCEPT_BACKOFF).await;
                continue;
            }
        };
        // Small answers should leave at once rather than wait for Nagle's timer.
        let _ = tcp.set_nodelay(true);
        let service = TowerToHyperService::new(router.clone());
        let conn = graceful.watch(http.serve_connection(TokioIo::new(tcp), service));
        tokio::spawn(async move {
            if let Err(e) = conn.await {
                tracing::debug!(error = %e, "connection ended with an error");
            }
        });
    }
    drop(listener);
    let end = until.unwrap_or_else(|| Instant::now() + grace);
    tokio::select! {
        () = graceful.shutdown() => {}
        () = tokio::time::sleep_until(end) => abandon(&state),
    }
    Ok(())
}

/// Log what a shutdown whose grace time ran out leaves behind.
fn abandon(state: &AppState) {
    let abandoned = state.running_jobs();
    tracing::warn!(
        jobs = state.jobs_running(),
        abandoned = %abandoned.join("; "),
        "shutdown grace time passed; abandoning the requests still running"
    );
}

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
