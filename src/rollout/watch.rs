//! What starts a rescan of the models folder: file-system notifications, a polling interval
//! (for file systems that send none, such as many network mounts), and SIGHUP.
//!
//! Notifications arrive on notify's own thread and are squeezed into a channel of one slot, so
//! a burst of events (a copy writes many blocks) costs one rescan. After an event the watcher
//! waits for the folder to be quiet for [`QUIET`] (at most [`MAX_DELAY`]) before rescanning:
//! a rename is one event, a slow copy many.

use std::path::PathBuf;
use std::sync::Arc;
use std::time::Duration;

use notify::Watcher;
use tokio::sync::mpsc;

use super::Rollout;
use super::folder::is_bundle_name;

/// How long the folder must be quiet after an event before a rescan.
pub const QUIET: Duration = Duration::from_millis(50);
/// The longest a rescan waits for quiet after the first event.
pub const MAX_DELAY: Duration = Duration::from_secs(1);

/// How the folder is watched.
#[derive(Clone, Debug)]
pub struct WatchConfig {
    pub dir: PathBuf,
    /// Use the operating system's change notifications.
    pub notifications: bool,
    /// Rescan this often whatever happens; `None`: never.
    pub poll_every: Option<Duration>,
    /// Rescan on SIGHUP (Unix).
    pub on_hangup: bool,
}

/// The running watcher; it stops when dropped.
pub struct WatchHandle {
    task: tokio::task::JoinHandle<()>,
    /// Whether change notifications are active (false when the OS refused them).
    pub notifications: bool,
}

impl Drop for WatchHandle {
    fn drop(&mut self) {
        self.task.abort();
    }
}

/// Starts watching. Must be called within a tokio runtime.
pub fn spawn(rollout: Arc<Rollout>, config: WatchConfig) -> WatchHandle {
    let (tx, rx) = mpsc::channel::<()>(1);
    let watcher = if config.notifications {
        start_notifications(&config.dir, tx)
    } else {
        None
    };
    let notifications = watcher.is_some();
    let task = tokio::spawn(run(rollout, config, rx, watcher));
    WatchHandle {
        task,
        notifications,
    }
}

fn start_notifications(
    dir: &std::path::Path,
    tx: mpsc::Sender<()>,
) -> Option<notify::RecommendedWatcher> {
    let handler = move |event: notify::Result<notify::Event>| {
        let relevant = match &event {
            // Only bundle names matter; an event without paths may be an overflow notice.
            Ok(e) => e.paths.is_empty() || e.paths.iter().any(|p| is_bundle_name(p)),
            Err(_) => true,
        };
        if relevant {
            // Full means a rescan is already due: coalesce.
            let _ = tx.try_send(());
        }
    };
    let mut watcher = match notify::recommended_watcher(handler) {
        Ok(w) => w,
        Err(e) => {
            tracing::warn!(error = %e, "no change notifications; polling only");
            return None;
        }
    };
    match watcher.watch(dir, notify::RecursiveMode::NonRecursive) {
        Ok(()) => Some(watcher),
        Err(e) => {
            tracing::warn!(dir = %dir.display(), error = %e, "cannot watch the models folder; polling only");
            None
        }
    }
}

async fn run(
    rollout: Arc<Rollout>,
    config: WatchConfig,
    mut events: mpsc::Receiver<()>,
    // Kept alive for as long as the task runs: dropping it stops the notifications.
    _watcher: Option<notify::RecommendedWatcher>,
) {
    let mut poll = config.poll_every.map(|every| {
        let mut i = tokio::time::interval(every);
        i.set_missed_tick_behavior(tokio::time::MissedTickBehavior::Delay);
        i
    });
    let mut hangup = hangup_signal(config.on_hangup);
    loop {
        let why = tokio::select! {
            Some(()) = events.recv() => {
                settle_down(&mut events).await;
                "change notification"
            }
            _ = tick(&mut poll) => "poll",
            Some(()) = recv_hangup(&mut hangup) => "SIGHUP",
        };
        match rollout.rescan().await {
            Ok(report) if !report.is_empty() => {
                tracing::debug!(trigger = why, "rescan changed something");
            }
            Ok(_) => {}
            Err(e) => tracing::warn!(trigger = why, error = %e, "rescan failed"),
        }
    }
}

/// The next tick of the polling interval; never, without one.
async fn tick(poll: &mut Option<tokio::time::Interval>) {
    match poll {
        Some(i) => {
            i.tick().await;
        }
        None => std::future::pending().await,
    }
}

/// Waits until no event has come for [`QUIET`], or [`MAX_DELAY`] has passed.
async fn settle_down(events: &mut mpsc::Receiver<()>) {
    let deadline = tokio::time::Instant::now() + MAX_DELAY;
    loop {
        let quiet = tokio::time::sleep(QUIET);
        tokio::select! {
            _ = quiet => return,
            _ = tokio::time::sleep_until(deadline) => return,
            e = events.recv() => if e.is_none() { return },
        }
    }
}

#[cfg(unix)]
type Hangup = tokio::signal::unix::Signal;
#[cfg(not(unix))]
type Hangup = ();

#[cfg(unix)]
fn hangup_signal(wanted: bool) -> Option<Hangup> {
    if !wanted {
        return None;
    }
    match tokio::signal::unix::signal(tokio::signal::unix::SignalKind::hangup()) {
        Ok(s) => Some(s),
        Err(e) => {
            tracing::warn!(error = %e, "cannot listen for SIGHUP");
            None
        }
    }
}

#[cfg(not(unix))]
fn hangup_signal(_wanted: bool) -> Option<Hangup> {
    None
}

#[cfg(unix)]
async fn recv_hangup(h: &mut Option<Hangup>) -> Option<()> {
    match h {
        Some(s) => s.recv().await,
        None => std::future::pending().await,
    }
}

#[cfg(not(unix))]
async fn recv_hangup(_h: &mut Option<Hangup>) -> Option<()> {
    std::future::pending().await
}
