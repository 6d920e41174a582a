//! This replica's place in its fleet: its name, the fleet's names, and the check of the
//! producer affinity rule ([`crate::affinity`]) on batches that declare the set they were
//! routed over.

use super::error::{Result, ServiceError};
use crate::affinity;

/// A replica's identity (both parts optional: a lone server has neither).
#[derive(Debug, Clone, Default, PartialEq, Eq)]
pub struct Fleet {
    /// This replica's name (`serve --replica-name`).
    pub name: Option<String>,
    /// Every replica name of the fleet, this one included (`serve --fleet`); empty: not
    /// configured.
    pub members: Vec<String>,
}

impl Fleet {
    /// A checked identity: a valid name, a valid set that holds it.
    pub fn new(name: Option<String>, members: Vec<String>) -> std::result::Result<Fleet, String> {
        if let Some(n) = &name {
            affinity::check_name(n).map_err(|e| format!("--replica-name: {e}"))?;
        }
        if !members.is_empty() {
            affinity::check_set(&members).map_err(|e| format!("--fleet: {e}"))?;
            match &name {
                None => return Err("--fleet needs --replica-name (this replica's name in the fleet)".into()),
                Some(n) if !members.contains(n) => return Err(format!("--fleet does not name this replica ({n})")),
                Some(_) => {}
            }
        }
        Ok(Fleet { name, members })
    }

    /// Check a batch of `producer` that declares it was routed over `declared` (empty: the
    /// client declares nothing, and nothing is checked).
    pub fn check(&self, producer: &str, declared: &[String]) -> Result<()> {
        if declared.is_empty() {
            return Ok(());
        }
        let refuse = |why: String| Err(ServiceError::WrongReplica(format!("{why} (producer affinity: a producer's batches go to the replica that wins the rendezvous hash of its id over the fleet's names; see README, \"Producer affinity\")")));
        affinity::check_set(declared).map_err(|e| ServiceError::Invalid(format!("batch replicas: {e}")))?;
        let Some(me) = &self.name else {
            return refuse("the batch declares a replica set, but this server has no replica name (serve --replica-name), so it cannot check it".into());
        };
        if !self.members.is_empty() {
            let (mut a, mut b) = (declared.to_vec(), self.members.clone());
            a.sort();
            b.sort();
            if a != b {
                return refuse(format!("the batch was routed over the replicas [{}], but this replica's fleet is [{}]", declared.join(", "), self.members.join(", ")));
            }
        }
        if !declared.contains(me) {
            return refuse(format!("the batch was routed over the replicas [{}], which do not include this replica ({me})", declared.join(", ")));
        }
        match affinity::owner(producer, declared) {
            Some(owner) if owner == me => Ok(()),
            Some(owner) => refuse(format!("producer '{producer}' belongs to replica {owner}, not to this replica ({me})")),
            None => unreachable!("check_set refuses an empty set"),
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn names(v: &[&str]) -> Vec<String> {
        v.iter().map(|s| s.to_string()).collect()
    }

    #[test]
    fn identities_are_checked() {
        assert!(Fleet::new(None, vec![]).is_ok());
        assert!(Fleet::new(Some("mtgauge-0".into()), names(&["mtgauge-0", "mtgauge-1"])).is_ok());
        assert!(Fleet::new(Some("bad name".into()), vec![]).unwrap_err().contains("--replica-name"));
        assert!(Fleet::new(None, names(&["a"])).unwrap_err().contains("needs --replica-name"));
        assert!(Fleet::new(Some("c".into()), names(&["a", "b"])).unwrap_err().contains("does not name this replica"));
        assert!(Fleet::new(Some("a".into()), names(&["a", "a"])).unwrap_err().contains("twice"));
    }

    #[test]
    fn batches_are_refused_unless_their_producer_belongs_here() {
        let fleet = names(&["mtgauge-0", "mtgauge-1", "mtgauge-2"]);
        // probe-worker-10 belongs to mtgauge-2 (the vectors of crate::affinity).
        let owner = Fleet::new(Some("mtgauge-2".into()), fleet.clone()).unwrap();
        let other = Fleet::new(Some("mtgauge-0".into()), fleet.clone()).unwrap();
        let unnamed = Fleet::default();
        assert!(owner.check("probe-worker-10", &fleet).is_ok());
        let e = other.check("probe-worker-10", &fleet).unwrap_err();
        assert!(matches!(&e, ServiceError::WrongReplica(m) if m.contains("belongs to replica mtgauge-2, not to this replica (mtgauge-0)") && m.contains("Producer affinity")), "{e}");
        // Nothing declared: nothing checked (clients of one server, and older clients).
        assert!(other.check("probe-worker-10", &[]).is_ok() && unnamed.check("x", &[]).is_ok());
        // A declared set the server cannot check, or that is not its fleet.
        assert!(matches!(unnamed.check("probe-worker-10", &fleet), Err(ServiceError::WrongReplica(m)) if m.contains("no replica name")));
        let two = names(&["mtgauge-0", "mtgauge-2"]);
        assert!(matches!(owner.check("probe-worker-10", &two), Err(ServiceError::WrongReplica(m)) if m.contains("this replica's fleet is")));
        // Order does not matter.
        let mut shuffled = fleet.clone();
        shuffled.rotate_left(1);
        assert!(owner.check("probe-worker-10", &shuffled).is_ok());
        // Without a configured fleet: the declared set must hold this replica.
        let loose = Fleet::new(Some("mtgauge-2".into()), vec![]).unwrap();
        assert!(loose.check("probe-worker-10", &fleet).is_ok());
        assert!(matches!(loose.check("probe-worker-10", &names(&["mtgauge-0", "mtgauge-1"])), Err(ServiceError::WrongReplica(m)) if m.contains("do not include this replica")));
        assert!(matches!(owner.check("p", &names(&["ok", "no way"])), Err(ServiceError::Invalid(_))));
    }
}
