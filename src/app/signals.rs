//! Shutdown on a signal: SIGTERM or SIGINT cancels a token, for the daemon and `serve`.

/// Cancels `shutdown` on SIGTERM or SIGINT.
pub async fn stop_on_signal(shutdown: tokio_util::sync::CancellationToken) {
    use tokio::signal::unix::{SignalKind, signal};
    let (Ok(mut term), Ok(mut int)) = (signal(SignalKind::terminate()), signal(SignalKind::interrupt()))
    else {
        tracing::error!("cannot install signal handlers");
        return;
    };
    let name = tokio::select! {
        _ = term.recv() => "SIGTERM",
        _ = int.recv() => "SIGINT",
    };
    tracing::info!(signal = name, "stopping: no new polls; an ingest in progress rolls back");
    shutdown.cancel();
}
