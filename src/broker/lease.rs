//! Partition leases in the broker's key-value store: each partition of the frames is held by
//! at most one worker at a time, and the partitions spread evenly over the live workers.
//!
//! Two buckets whose entries expire `lease_ttl_ms` after their last write (the bucket's
//! maximum age, enforced by the server):
//! - `<name>_workers`: one key per live worker, rewritten every renewal (a heartbeat);
//! - `<name>_leases`: key `p<partition>`, value the holder's id. A lease is taken with the
//!   store's create (only if absent) and renewed with its compare-and-set update on the
//!   revision the holder last wrote, so a holder that lost its lease (it expired while the
//!   holder stalled, and another took it) finds out at its next renewal and stops.
//!
//! Every renewal period (a quarter of the time to live) each worker renews what it holds,
//! counts the live workers and computes its fair share: `P / W` partitions, one more for the
//! first `P mod W` workers in id order. A worker over its share releases partitions (deletes
//! the keys), one under it tries to create the leases of partitions no one holds. A dead
//! worker's keys expire after the time to live; the survivors' next renewal takes them. So a
//! partition moves within `ttl + ttl/4` of its holder's death, plus the server's expiry check.

use super::{Broker, BrokerError};
use async_nats::jetstream::kv;
use futures::StreamExt;
use std::collections::BTreeMap;
use std::time::Duration;

/// A change of what this worker holds.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum LeaseChange {
    /// The partition is ours now: (re)start its consumer.
    Acquired(u32),
    /// The partition is no longer ours (released for balance, or lost): stop its consumer.
    Dropped(u32),
}

/// The leases one worker holds.
#[derive(Debug)]
pub struct Leases {
    leases: kv::Store,
    workers: kv::Store,
    id: String,
    partitions: u32,
    ttl: Duration,
    /// Held partitions and the revision of our last write of each.
    held: BTreeMap<u32, u64>,
    /// Live workers at the last renewal.
    live: usize,
}

fn key(p: u32) -> String {
    format!("p{p}")
}

/// The fair share of worker number `rank` (0-based, in id order) of `live` workers.
pub fn fair_share(partitions: u32, live: usize, rank: usize) -> usize {
    let live = live.max(1);
    let p = partitions as usize;
    p / live + usize::from(rank < p % live)
}

impl Leases {
    /// Opens the buckets for worker `id`.
    pub async fn open(broker: &Broker, id: &str) -> Result<Self, BrokerError> {
        let ttl = Duration::from_millis(broker.config.lease_ttl_ms);
        Ok(Self {
            leases: broker.bucket(&broker.names.leases_bucket(), ttl).await?,
            workers: broker.bucket(&broker.names.workers_bucket(), ttl).await?,
            id: id.to_string(),
            partitions: broker.config.partitions,
            ttl,
            held: BTreeMap::new(),
            live: 0,
        })
    }

    /// How often [`Leases::renew`] must run.
    pub fn period(&self) -> Duration {
        self.ttl / 4
    }

    /// The partitions held now.
    pub fn held(&self) -> impl Iterator<Item = u32> + '_ {
        self.held.keys().copied()
    }

    /// Live workers at the last renewal (this one included).
    pub fn live_workers(&self) -> usize {
        self.live
    }

    /// One renewal: heartbeat, renew, rebalance. Returns what changed, releases first.
    /// Broker errors are logged and retried at the next renewal (a lease that cannot be
    /// renewed before it expires is dropped then).
    pub async fn renew(&mut self) -> Vec<LeaseChange> {
        let mut changes = Vec::new();
        if let Err(e) = self.workers.put(&self.id, "alive".into()).await {
            tracing::warn!(error = %e, "worker heartbeat failed");
        }
        let held: Vec<(u32, u64)> = self.held.iter().map(|(p, r)| (*p, *r)).collect();
        for (p, rev) in held {
            match self
                .leases
                .update(key(p), self.id.clone().into(), rev)
                .await
            {
                Ok(r) => {
                    self.held.insert(p, r);
                }
                Err(e) => {
                    // Wrong revision: someone else holds it now. Any other error: we cannot
                    // prove we hold it, so we stop before the time to live could run out.
                    tracing::warn!(partition = p, error = %e, "lease lost");
                    self.held.remove(&p);
                    changes.push(LeaseChange::Dropped(p));
                }
            }
        }
        let mut live: Vec<String> = match self.workers.keys().await {
            Ok(keys) => keys.filter_map(|k| async { k.ok() }).collect().await,
            Err(e) => {
                tracing::warn!(error = %e, "cannot list the live workers");
                return changes;
            }
        };
        if !live.contains(&self.id) {
            live.push(self.id.clone());
        }
        live.sort();
        self.live = live.len();
        let rank = live.iter().position(|w| *w == self.id).unwrap_or(0);
        let share = fair_share(self.partitions, live.len(), rank);
        while self.held.len() > share {
            let (&p, &rev) = self.held.iter().next_back().expect("more than share >= 0");
            self.held.remove(&p);
            changes.push(LeaseChange::Dropped(p));
            if let Err(e) = self.leases.delete_expect_revision(key(p), Some(rev)).await {
                tracing::warn!(partition = p, error = %e, "lease release failed; it expires instead");
            }
        }
        if self.held.len() < share {
            // Start looking at a place of our own, so that workers joining together do not all
            // race for partition 0.
            let start = (rank * self.partitions as usize) / live.len().max(1);
            for i in 0..self.partitions as usize {
                if self.held.len() >= share {
                    break;
                }
                let p = ((start + i) % self.partitions as usize) as u32;
                if self.held.contains_key(&p) {
                    continue;
                }
                if let Ok(rev) = self.leases.create(key(p), self.id.clone().into()).await {
                    self.held.insert(p, rev);
                    changes.push(LeaseChange::Acquired(p));
                }
            }
        }
        changes
    }

    /// Releases every lease and the heartbeat (an orderly stop: the partitions move at the
    /// others' next renewal instead of after the time to live).
    pub async fn release_all(&mut self) {
        for (p, rev) in std::mem::take(&mut self.held) {
            let _ = self.leases.delete_expect_revision(key(p), Some(rev)).await;
        }
        let _ = self.workers.delete(&self.id).await;
    }
}

#[cfg(test)]
mod tests {
    use super::fair_share;

    #[test]
    fn shares_add_up_and_differ_by_at_most_one() {
        for p in [1u32, 5, 16, 17] {
            for w in 1..=7usize {
                let shares: Vec<usize> = (0..w).map(|r| fair_share(p, w, r)).collect();
                assert_eq!(shares.iter().sum::<usize>(), p as usize);
                let (min, max) = (shares.iter().min().unwrap(), shares.iter().max().unwrap());
                assert!(max - min <= 1);
            }
        }
    }
}
