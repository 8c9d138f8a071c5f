//! Shutdown requests: SIGTERM (systemd, a container runtime, `kill`) and SIGINT (Ctrl-C).
//! Both mean the same: take no new work, raise the cancel flag so a long fit stops at its
//! next safe point, record the run as abandoned, release the lease, exit.

use std::sync::atomic::{AtomicBool, Ordering};
use std::sync::Arc;

use tokio::signal::unix::{signal, Signal, SignalKind};

/// The installed handlers. Install them before taking the lease: from then on a signal
/// no longer kills the process outright, it asks it to stop.
pub struct ShutdownSignals {
    term: Signal,
    int: Signal,
}

impl ShutdownSignals {
    pub fn install() -> std::io::Result<ShutdownSignals> {
        Ok(ShutdownSignals {
            term: signal(SignalKind::terminate())?,
            int: signal(SignalKind::interrupt())?,
        })
    }

    /// Wait for the next request; returns the signal's name.
    pub async fn recv(&mut self) -> &'static str {
        tokio::select! {
            _ = self.term.recv() => "SIGTERM",
            _ = self.int.recv() => "SIGINT",
        }
    }
}

/// Raise `cancel` on the first SIGTERM or SIGINT (for the one-shot commands).
pub fn cancel_on_shutdown(cancel: Arc<AtomicBool>) -> std::io::Result<tokio::task::JoinHandle<()>> {
    let mut signals = ShutdownSignals::install()?;
    Ok(tokio::spawn(async move {
        let name = signals.recv().await;
        tracing::warn!("{name} received: stopping at the next safe point");
        cancel.store(true, Ordering::Relaxed);
    }))
}
