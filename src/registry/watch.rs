//! The store watcher: reads the map store again when the file system reports a change (inotify
//! through the notify crate), on a periodic rescan as a fallback, and on SIGHUP.
//!
//! Events are coalesced: a burst of writes (an editor saving in place, a Kubernetes ConfigMap's
//! `..data` symlink swap) waits for a short settle time and leads to one scan. A scan that finds
//! a partial or invalid file refuses it and keeps the serving map; the write that completes the
//! file raises another event and the next scan picks it up.

use super::Registry;
use notify::{RecursiveMode, Watcher as _};
use std::future::Future;
use std::sync::Arc;
use std::time::Duration;
use tokio::sync::Notify;
use tokio::task::JoinHandle;

/// How the store is watched.
#[derive(Debug, Clone)]
pub struct WatchOptions {
    /// Period of the fallback rescan (also the bound on pickup time when file events are lost).
    pub rescan_interval: Duration,
    /// Use file-system events (inotify); without them only the periodic rescan runs.
    pub file_events: bool,
    /// Quiet time after an event before scanning, so a burst of writes leads to one scan.
    pub settle: Duration,
    /// Rescan on SIGHUP (the process's handler; leave off when embedding in a larger program).
    pub sighup: bool,
}

impl Default for WatchOptions {
    fn default() -> Self {
        WatchOptions {
            rescan_interval: Duration::from_secs(5),
            file_events: true,
            settle: Duration::from_millis(50),
            sighup: false,
        }
    }
}

/// Spawns the watcher of `registry`'s store; the first scan runs at once. The task ends when
/// `shutdown` completes. Does nothing useful for a registry without a store.
pub fn spawn_store_watcher(
    registry: Arc<Registry>,
    options: WatchOptions,
    shutdown: impl Future<Output = ()> + Send + 'static,
) -> JoinHandle<()> {
    tokio::spawn(async move {
        let Some(dir) = registry.store_dir() else {
            return;
        };
        // Notify: the event callback runs on notify's own thread; a stored permit coalesces
        // any number of events into one wake-up.
        let changed = Arc::new(Notify::new());
        let _watcher = if options.file_events {
            let tx = changed.clone();
            let w = notify::recommended_watcher(move |res: notify::Result<notify::Event>| {
                if res.is_ok_and(|e| !e.kind.is_access()) {
                    tx.notify_one();
                }
            })
            .and_then(|mut w| w.watch(&dir, RecursiveMode::Recursive).map(|()| w));
            match w {
                Ok(w) => Some(w),
                Err(e) => {
                    tracing::warn!(dir = %dir.display(), error = %e, "cannot watch the map store for changes; relying on the periodic rescan");
                    None
                }
            }
        } else {
            None
        };
        let mut hangup = if options.sighup {
            hangup_signal()
        } else {
            None
        };
        let mut tick = tokio::time::interval(options.rescan_interval);
        tick.set_missed_tick_behavior(tokio::time::MissedTickBehavior::Delay);
        tokio::pin!(shutdown);
        loop {
            tokio::select! {
                () = &mut shutdown => break,
                () = changed.notified() => {
                    tokio::time::sleep(options.settle).await;
                    tracing::debug!("map store changed");
                }
                _ = tick.tick() => {}
                Some(()) = recv_hangup(&mut hangup) => {
                    tracing::info!("SIGHUP received: reading the map store again");
                }
            }
            let r = registry.clone();
            if let Err(e) = tokio::task::spawn_blocking(move || r.rescan()).await {
                tracing::error!(error = %e, "map store scan failed");
            }
        }
    })
}

#[cfg(unix)]
type Hangup = tokio::signal::unix::Signal;
#[cfg(not(unix))]
type Hangup = ();

#[cfg(unix)]
fn hangup_signal() -> Option<Hangup> {
    match tokio::signal::unix::signal(tokio::signal::unix::SignalKind::hangup()) {
        Ok(s) => Some(s),
        Err(e) => {
            tracing::warn!(error = %e, "cannot listen for SIGHUP");
            None
        }
    }
}

#[cfg(not(unix))]
fn hangup_signal() -> Option<Hangup> {
    None
}

async fn recv_hangup(h: &mut Option<Hangup>) -> Option<()> {
    match h {
        #[cfg(unix)]
        Some(s) => s.recv().await,
        _ => std::future::pending().await,
    }
}
