//! Single-instance operation: who this process is, when another holder counts as stale,
//! and the heartbeat that keeps our claim fresh while we hold it.
//!
//! `serve`, `run-once` and `refit` write runs and fits, so each holds the database's lease
//! (`instance_lease`) for as long as it runs. A second one refuses with the holder's
//! identity. A holder is stale, and its lease is taken over (recorded in `lease_events`
//! and logged), when it is on this host and its process is gone (or its pid is our own:
//! a restarted container reuses pid 1), or when its heartbeat is older than the
//! configured limit (`store.lease_stale_after_seconds`, default [`STALE_AFTER`]: a holder
//! on another host, or a hung or stopped one). A process whose lease was taken over while
//! it was stopped finds out at its next heartbeat or, at the latest, when it tries to
//! write a fit: the write is fenced ([`crate::store::Fence`]) and refused.

use std::sync::atomic::{AtomicBool, Ordering};
use std::sync::Arc;
use std::time::Duration;

use chrono::{DateTime, Utc};
use tracing::{error, info, warn};

use crate::store::{Fence, LeaseAttempt, LeaseClaim, LeaseHolder, Store, StoreError};

/// How often the holder renews its heartbeat (more often under a short stale limit).
pub const HEARTBEAT_EVERY: Duration = Duration::from_secs(5);
/// By default a heartbeat older than this marks the holder stale (twelve missed beats).
pub const STALE_AFTER: Duration = Duration::from_secs(60);

/// The heartbeat interval under a stale limit: at least four beats fit in the limit.
fn heartbeat_every(stale_after: Duration) -> Duration {
    HEARTBEAT_EVERY.min(stale_after / 4)
}

#[derive(Debug, thiserror::Error)]
pub enum LeaseError {
    #[error("database {database} is in use by another tidemark: pid {} on host {} (holder {}, since {}, last heartbeat {}); only one serve, run-once or refit may run at a time: wait for it to finish or stop it", .holder.pid, .holder.host, .holder.holder, .holder.acquired_at, .holder.heartbeat_at)]
    Held {
        database: String,
        holder: LeaseHolder,
    },
    #[error(transparent)]
    Store(#[from] StoreError),
}

/// The lease while we hold it. Call [`Lease::release`] on the way out; a process that
/// dies without releasing leaves a lease the next start takes over.
#[derive(Debug)]
pub struct Lease {
    store: Store,
    claim: LeaseClaim,
    fence: Fence,
    heartbeat: tokio::task::JoinHandle<()>,
    lost: Arc<AtomicBool>,
}

/// This process's identity: a random holder id, our pid and host name.
pub fn own_claim(command: &'static str) -> LeaseClaim {
    LeaseClaim {
        holder: format!("{:016x}", rand::random::<u64>()),
        pid: i64::from(std::process::id()),
        host: host_name(),
        command,
    }
}

/// Why `holder` is stale, seen from `me` at `now` with heartbeats older than `limit`
/// counting as stale, or `None` when it may still be working.
pub fn stale_reason(
    holder: &LeaseHolder,
    me: &LeaseClaim,
    now: DateTime<Utc>,
    limit: Duration,
) -> Option<String> {
    if holder.host == me.host {
        if holder.pid == me.pid {
            return Some(format!(
                "pid {} on {} is this process, so the holder that recorded it is gone",
                holder.pid, holder.host
            ));
        }
        if !pid_alive(holder.pid) {
            return Some(format!(
                "process {} on {} is not running",
                holder.pid, holder.host
            ));
        }
    }
    match DateTime::parse_from_rfc3339(&holder.heartbeat_at) {
        Ok(beat) => {
            let age = now.signed_duration_since(beat.with_timezone(&Utc));
            let max = chrono::Duration::from_std(limit).unwrap_or(chrono::Duration::MAX);
            (age > max).then(|| {
                format!(
                    "its last heartbeat was {} s ago (stale after {} s)",
                    age.num_seconds(),
                    limit.as_secs()
                )
            })
        }
        Err(_) => Some(format!(
            "its heartbeat time {:?} cannot be read",
            holder.heartbeat_at
        )),
    }
}

impl Lease {
    /// Claim the lease, taking it over from a holder whose heartbeat is older than
    /// `stale_after` (or whose process is gone), and start the heartbeat. When the
    /// heartbeat finds the lease taken by another process, `cancel` is raised so the work
    /// stops at its next safe point.
    pub async fn acquire(
        store: &Store,
        stale_after: Duration,
        cancel: Arc<AtomicBool>,
        command: &'static str,
    ) -> Result<Lease, LeaseError> {
        let claim = own_claim(command);
        let attempt = store
            .acquire_lease(&claim, |h| stale_reason(h, &claim, Utc::now(), stale_after))
            .await?;
        let fence = match attempt {
            LeaseAttempt::Held(holder) => {
                return Err(LeaseError::Held {
                    database: store.path().display().to_string(),
                    holder,
                })
            }
            LeaseAttempt::Acquired {
                fence,
                taken_over,
                abandoned_runs,
            } => {
                if let Some((previous, reason)) = taken_over {
                    warn!(
                        previous_holder = %previous.holder,
                        previous_pid = previous.pid,
                        previous_host = %previous.host,
                        "took over a stale lease: {reason}"
                    );
                }
                if !abandoned_runs.is_empty() {
                    warn!(
                        ?abandoned_runs,
                        "marked runs left 'running' by a stopped process as abandoned"
                    );
                }
                fence
            }
        };
        info!(holder = %claim.holder, generation = fence.generation, pid = claim.pid, host = %claim.host, "lease acquired");
        let lost = Arc::new(AtomicBool::new(false));
        let heartbeat = tokio::spawn(beat(
            store.clone(),
            fence.clone(),
            heartbeat_every(stale_after),
            lost.clone(),
            cancel,
        ));
        Ok(Lease {
            store: store.clone(),
            claim,
            fence,
            heartbeat,
            lost,
        })
    }

    /// True once another process has taken the lease from us.
    pub fn lost(&self) -> bool {
        self.lost.load(Ordering::Relaxed)
    }

    pub fn claim(&self) -> &LeaseClaim {
        &self.claim
    }

    /// The token this process writes fits under.
    pub fn fence(&self) -> &Fence {
        &self.fence
    }

    /// The origin of a run this process makes while it holds the lease.
    pub fn run_origin(&self, trigger: crate::vocabulary::RunTrigger) -> crate::store::RunOrigin {
        crate::store::RunOrigin {
            trigger,
            command: self.claim.command,
            fence: Some(self.fence.clone()),
        }
    }

    /// Stop the heartbeat and give the lease up.
    pub async fn release(self) -> Result<(), StoreError> {
        self.heartbeat.abort();
        if self.store.release_lease(&self.claim).await? {
            info!(holder = %self.claim.holder, "lease released");
        }
        Ok(())
    }
}

async fn beat(
    store: Store,
    fence: Fence,
    period: Duration,
    lost: Arc<AtomicBool>,
    cancel: Arc<AtomicBool>,
) {
    let mut every = tokio::time::interval(period);
    every.set_missed_tick_behavior(tokio::time::MissedTickBehavior::Delay);
    every.tick().await; // the first tick is immediate; the claim itself was a beat
    loop {
        every.tick().await;
        match store.heartbeat_lease(&fence).await {
            Ok(true) => {}
            Ok(false) => {
                error!(
                    holder = %fence.holder,
                    generation = fence.generation,
                    "another process took over this process's lease (its heartbeat was late); stopping at the next safe point"
                );
                lost.store(true, Ordering::Relaxed);
                cancel.store(true, Ordering::Relaxed);
                return;
            }
            // A busy database delays a beat; the next one retries.
            Err(e) => warn!("lease heartbeat failed: {e}"),
        }
    }
}

/// Whether a process with this pid exists on this host (signal 0 checks without sending).
fn pid_alive(pid: i64) -> bool {
    let Ok(pid) = libc::pid_t::try_from(pid) else {
        return false;
    };
    // pid 0 and negative pids name process groups, not a process.
    if pid <= 0 {
        return false;
    }
    // SAFETY: kill with signal 0 sends nothing; it only reports whether the pid exists.
    let rc = unsafe { libc::kill(pid, 0) };
    rc == 0 || std::io::Error::last_os_error().raw_os_error() == Some(libc::EPERM)
}

fn host_name() -> String {
    let mut buf = [0u8; 256];
    // SAFETY: the buffer is valid for its length; gethostname writes at most that much.
    let rc = unsafe { libc::gethostname(buf.as_mut_ptr().cast(), buf.len()) };
    if rc == 0 {
        let end = buf.iter().position(|&b| b == 0).unwrap_or(buf.len());
        let name = String::from_utf8_lossy(&buf[..end]).trim().to_string();
        if !name.is_empty() {
            return name;
        }
    }
    "unknown-host".to_string()
}

#[cfg(test)]
mod tests {
    use super::*;

    fn holder(pid: i64, host: &str, beat: DateTime<Utc>) -> LeaseHolder {
        LeaseHolder {
            holder: "other".into(),
            pid,
            host: host.into(),
            acquired_at: beat.to_rfc3339(),
            heartbeat_at: beat.to_rfc3339(),
            command: None,
            generation: None,
        }
    }

    #[test]
    fn a_live_holder_with_a_fresh_heartbeat_is_not_stale() {
        let me = own_claim("test");
        let now = Utc::now();
        // Our parent process (the test harness's parent) is alive on this host.
        let parent = i64::from(std::os::unix::process::parent_id());
        assert_eq!(
            stale_reason(&holder(parent, &me.host, now), &me, now, STALE_AFTER),
            None
        );
        assert_eq!(
            stale_reason(&holder(parent, "elsewhere", now), &me, now, STALE_AFTER),
            None
        );
    }

    #[test]
    fn a_dead_pid_on_this_host_is_stale_but_not_on_another_host() {
        let me = own_claim("test");
        let now = Utc::now();
        let mut child = std::process::Command::new("true")
            .spawn()
            .expect("spawn true");
        let dead = i64::from(child.id());
        child.wait().expect("wait");
        let r = stale_reason(&holder(dead, &me.host, now), &me, now, STALE_AFTER);
        assert!(r.is_some_and(|r| r.contains("not running")));
        // Elsewhere the pid means nothing: only the heartbeat decides.
        assert_eq!(
            stale_reason(&holder(dead, "elsewhere", now), &me, now, STALE_AFTER),
            None
        );
    }

    #[test]
    fn an_old_heartbeat_or_our_own_pid_is_stale() {
        let me = own_claim("test");
        let now = Utc::now();
        let old = now - chrono::Duration::seconds(61);
        let r = stale_reason(&holder(1, "elsewhere", old), &me, now, STALE_AFTER);
        assert!(r.is_some_and(|r| r.contains("61 s ago")));
        // A shorter configured limit makes a younger heartbeat stale.
        let recent = now - chrono::Duration::seconds(5);
        let short = Duration::from_secs(3);
        let r = stale_reason(&holder(1, "elsewhere", recent), &me, now, short);
        assert!(r.is_some_and(|r| r.contains("stale after 3 s")));
        assert_eq!(heartbeat_every(short), Duration::from_millis(750));
        assert_eq!(heartbeat_every(STALE_AFTER), HEARTBEAT_EVERY);
        let r = stale_reason(&holder(me.pid, &me.host, now), &me, now, STALE_AFTER);
        assert!(r.is_some_and(|r| r.contains("is this process")));
        assert!(!pid_alive(0) && !pid_alive(-1));
    }
}
