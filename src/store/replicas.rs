//! What several replicas on one shared store need of it beyond [`Store`](super::Store): who
//! leads, word of changes other replicas made, and retrains queued in the store for the leader.
//!
//! Exactly one replica at a time leads: it runs the schedule, retention and training, while
//! every replica scores, takes outcomes and examples and answers reads. [`Leadership`] is the
//! one flag every part reads ("do I lead?"); on a store only one process can open (sled) the
//! process always leads and nothing here runs. On a shared store (PostgreSQL) the scheduler
//! keeps a [`ReplicaLink`] (a held connection) and asks it about once a second whether it
//! leads, and waits on it for notifications; [`SharedStore`] queues manual retrains in the
//! store, so a retrain sent to any replica is run by whichever replica leads.
//!
//! This module holds only the seam; the PostgreSQL side is `pg_store::replica`.

use std::sync::atomic::{AtomicBool, AtomicU32, Ordering};
use std::sync::Mutex;
use std::time::Duration;

use super::StoreError;
use crate::promotion::RunStatus;
use crate::threads::lock;

/// Whether this replica leads, read by every part that does leader-only work.
#[derive(Debug)]
pub struct Leadership {
    replica_id: String,
    shared: bool,
    leads: AtomicBool,
    leader_id: Mutex<Option<String>>,
}

impl Leadership {
    /// The only process on its store: it leads from the start and for good.
    pub fn alone(replica_id: String) -> Leadership {
        Leadership {
            leader_id: Mutex::new(Some(replica_id.clone())),
            replica_id,
            shared: false,
            leads: AtomicBool::new(true),
        }
    }

    /// One of several replicas: it follows until the election says it leads.
    pub fn shared(replica_id: String) -> Leadership {
        Leadership {
            replica_id,
            shared: true,
            leads: AtomicBool::new(false),
            leader_id: Mutex::new(None),
        }
    }

    pub fn replica_id(&self) -> &str {
        &self.replica_id
    }

    /// Whether other replicas may share the store (and so the election runs).
    pub fn is_shared(&self) -> bool {
        self.shared
    }

    /// Whether this replica leads right now.
    pub fn leads(&self) -> bool {
        self.leads.load(Ordering::SeqCst)
    }

    /// The leading replica's id, when known.
    pub fn leader_id(&self) -> Option<String> {
        lock(&self.leader_id).clone()
    }

    /// Records the election's latest answer (shared stores only). Returns whether this
    /// replica's leadership changed.
    pub fn set(&self, leads: bool, leader_id: Option<String>) -> bool {
        if !self.shared {
            return false;
        }
        let leader_id = if leads {
            Some(self.replica_id.clone())
        } else {
            leader_id
        };
        *lock(&self.leader_id) = leader_id;
        self.leads.swap(leads, Ordering::SeqCst) != leads
    }
}

/// A name for this process among replicas: the host name and the process id (unique on one
/// host; on Kubernetes the host name is the pod's name), with a counter when one process opens
/// more than one service (the tests do).
pub fn new_replica_id() -> String {
    static OPENED: AtomicU32 = AtomicU32::new(0);
    let host = std::fs::read_to_string("/proc/sys/kernel/hostname")
        .ok()
        .map(|h| h.trim().to_owned())
        .filter(|h| !h.is_empty())
        .or_else(|| std::env::var("HOSTNAME").ok())
        .unwrap_or_else(|| "replica".into());
    let host: String = host.chars().take(40).collect();
    let pid = std::process::id();
    match OPENED.fetch_add(1, Ordering::SeqCst) {
        0 => format!("{host}-{pid}"),
        n => format!("{host}-{pid}-{}", n + 1),
    }
}

/// What a [`ReplicaLink`] heard while it waited.
#[derive(Debug, Clone, Copy, Default, PartialEq, Eq)]
pub struct Heard {
    /// Another replica changed the active model, the shadow, the freeze or the log.
    pub changes: bool,
    /// A retrain was queued in the store.
    pub run_requests: bool,
}

/// A held connection to the shared store: the election and the notifications.
pub trait ReplicaLink: Send {
    /// Waits up to `timeout` for notifications from other replicas (returns early on the first).
    /// An error means the connection is gone: leadership went with it.
    fn wait(&mut self, timeout: Duration) -> Result<Heard, StoreError>;
    /// Takes leadership if no one holds it, or checks that this link still holds it.
    fn contend(&mut self) -> Result<bool, StoreError>;
    /// The leading replica's id, if one leads.
    fn leader(&mut self) -> Result<Option<String>, StoreError>;
}

/// A retrain queued in the store, as the leader takes it.
#[derive(Debug, Clone, PartialEq)]
pub struct QueuedRun {
    pub run: RunStatus,
    /// Recorded in the log entry (`trigger_detail`).
    pub detail: Option<String>,
}

/// The store side of several replicas.
pub trait SharedStore: Send + Sync {
    /// A new held connection for the election and the notifications, named `replica_id`.
    fn link(&self, replica_id: &str) -> Result<Box<dyn ReplicaLink>, StoreError>;
    /// Writes `run` (state queued) and queues it for the leader, in one transaction that also
    /// wakes the leader; refuses (returns `false`, writing nothing) when `capacity` runs are
    /// already waiting.
    fn queue_run(
        &self,
        run: &RunStatus,
        detail: Option<&str>,
        capacity: usize,
    ) -> Result<bool, StoreError>;
    /// Takes up to `max` queued runs, oldest first; each is taken by one replica only.
    fn take_queued_runs(&self, max: usize) -> Result<Vec<QueuedRun>, StoreError>;
    /// The ids of runs queued and not yet taken.
    fn queued_run_ids(&self) -> Result<Vec<String>, StoreError>;
    /// A count that grows with every example written by any replica (outcomes and backfilled
    /// rows); it lags (on PostgreSQL, server statistics: 15 s once in the tests) and may start
    /// again from 0 (a statistics reset).
    fn examples_written(&self) -> Result<u64, StoreError>;
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn a_process_alone_always_leads_and_ignores_the_election() {
        let alone = Leadership::alone("a".into());
        assert!(alone.leads());
        assert!(!alone.set(false, Some("b".into())));
        assert!(alone.leads());
        assert_eq!(alone.leader_id().as_deref(), Some("a"));
    }

    #[test]
    fn a_shared_replica_follows_until_elected_and_names_the_leader() {
        let replica = Leadership::shared("a".into());
        assert!(!replica.leads());
        assert_eq!(replica.leader_id(), None);
        assert!(!replica.set(false, Some("b".into())));
        assert_eq!(replica.leader_id().as_deref(), Some("b"));
        assert!(replica.set(true, Some("b".into())), "gaining is a change");
        assert_eq!(
            replica.leader_id().as_deref(),
            Some("a"),
            "a leader names itself"
        );
        assert!(!replica.set(true, None));
        assert!(replica.set(false, None), "losing is a change");
        assert!(!replica.leads());
    }

    #[test]
    fn replica_ids_of_one_process_differ() {
        let first = new_replica_id();
        let second = new_replica_id();
        assert_ne!(first, second);
        assert!(second.contains(&std::process::id().to_string()));
    }
}
