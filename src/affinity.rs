//! Producer affinity: which replica of a fleet a producer's batches go to.
//!
//! A replica keeps the sequence marks of the producers that send to it, so a batch counts once
//! only if every batch of a producer reaches the same replica. Clients therefore pick the
//! replica by rendezvous (highest-random-weight) hashing of the producer id over the replicas'
//! names (Thaler & Ravishankar 1998): every client that knows the same set of names picks the
//! same replica, and a replica that leaves or joins moves only the producers it wins or loses.
//!
//! # The rule, exactly (for clients in any language)
//! For each replica name r of the set and the producer id p (both as UTF-8 bytes):
//!
//! ```text
//! weight(r, p) = the first 8 bytes, read as a big-endian unsigned 64-bit integer, of
//!                SHA-256( "mtgauge-affinity-v1" || 0x00 || r || 0x00 || p )
//! owner(p)     = the r with the largest weight; on equal weights, the r that sorts first
//!                (bytewise)
//! ```
//!
//! SHA-256 is FIPS 180-4. The test vectors below (and in README.md) were computed with Python's
//! hashlib. A set has 1 to [`MAX_REPLICAS`] distinct names, each a valid [`check_name`] name.
//!
//! Pure: no I/O.

use sha2::{Digest, Sha256};

/// The fixed prefix of every hashed string (a version of the rule).
pub const DOMAIN: &str = "mtgauge-affinity-v1";
/// Most replica names in one set.
pub const MAX_REPLICAS: usize = 1024;
/// Longest replica name, in bytes (a DNS label set, like a pod name).
pub const MAX_NAME_BYTES: usize = 253;

/// The weight of replica `replica` for producer `producer`.
pub fn weight(replica: &str, producer: &str) -> u64 {
    let mut h = Sha256::new();
    h.update(DOMAIN.as_bytes());
    h.update([0u8]);
    h.update(replica.as_bytes());
    h.update([0u8]);
    h.update(producer.as_bytes());
    let d = h.finalize();
    let mut first = [0u8; 8];
    first.copy_from_slice(&d[..8]);
    u64::from_be_bytes(first)
}

/// The replicas of `replicas` in the order `producer` prefers them: its owner first, then the
/// one it would go to if the owner were missing, and so on.
pub fn preference<'a>(producer: &str, replicas: &'a [String]) -> Vec<&'a str> {
    let mut ranked: Vec<(u64, &str)> = replicas.iter().map(|r| (weight(r, producer), r.as_str())).collect();
    ranked.sort_by(|a, b| b.0.cmp(&a.0).then_with(|| a.1.as_bytes().cmp(b.1.as_bytes())));
    ranked.into_iter().map(|(_, r)| r).collect()
}

/// The replica of `replicas` that `producer` belongs to (None for an empty set).
pub fn owner<'a>(producer: &str, replicas: &'a [String]) -> Option<&'a str> {
    replicas.iter().map(|r| (weight(r, producer), r.as_str())).reduce(|best, c| if c.0 > best.0 || (c.0 == best.0 && c.1.as_bytes() < best.1.as_bytes()) { c } else { best }).map(|(_, r)| r)
}

/// Why a replica name or set is not valid.
#[derive(Debug, Clone, PartialEq, Eq, thiserror::Error)]
pub enum NameError {
    /// A name that is empty, too long, or has a character other than ASCII letters, digits,
    /// '.', '-' and '_'.
    #[error("replica name {0:?}: expected 1 to 253 ASCII letters, digits, '.', '-' or '_'")]
    Name(String),
    /// The same name twice.
    #[error("replica name {0:?} is given twice")]
    Duplicate(String),
    /// No names, or more than [`MAX_REPLICAS`].
    #[error("a replica set has 1 to 1024 names, not {0}")]
    Size(usize),
}

/// Check one replica name.
pub fn check_name(name: &str) -> Result<(), NameError> {
    let ok = !name.is_empty() && name.len() <= MAX_NAME_BYTES && name.bytes().all(|b| b.is_ascii_alphanumeric() || b"._-".contains(&b));
    if ok {
        Ok(())
    } else {
        Err(NameError::Name(name.to_owned()))
    }
}

/// Check a set of replica names: its size, each name, no name twice.
pub fn check_set(names: &[String]) -> Result<(), NameError> {
    if names.is_empty() || names.len() > MAX_REPLICAS {
        return Err(NameError::Size(names.len()));
    }
    let mut seen = std::collections::HashSet::new();
    for n in names {
        check_name(n)?;
        if !seen.insert(n.as_str()) {
            return Err(NameError::Duplicate(n.clone()));
        }
    }
    Ok(())
}

#[cfg(test)]
mod tests {
    use super::*;

    fn set(names: &[&str]) -> Vec<String> {
        names.iter().map(|s| s.to_string()).collect()
    }

    /// Computed with Python 3.11 hashlib (FIPS 180-4 SHA-256), outside this code:
    /// `int.from_bytes(hashlib.sha256(b"mtgauge-affinity-v1\0" + r + b"\0" + p).digest()[:8], "big")`.
    /// The same vectors are in README.md.
    const VECTORS: [(&str, &str, u64); 6] = [
        ("mtgauge-0", "probe-worker-1", 18296509729979423788),
        ("mtgauge-1", "probe-worker-1", 11069570996062914974),
        ("mtgauge-2", "probe-worker-1", 14554314617060021204),
        ("mtgauge-0", "", 16072002531310746495),
        ("r", "p", 9680649993900653120),
        ("mtgauge-1", "fähre-7", 13064330390906838648),
    ];

    /// Owners over mtgauge-0, mtgauge-1, mtgauge-2, from the same Python weights.
    const OWNERS: [(&str, &str); 6] = [
        ("probe-worker-1", "mtgauge-0"),
        ("probe-worker-2", "mtgauge-1"),
        ("probe-worker-9", "mtgauge-1"),
        ("probe-worker-10", "mtgauge-2"),
        ("live-de-1", "mtgauge-1"),
        ("live-de-2", "mtgauge-0"),
    ];

    #[test]
    fn weights_match_the_published_vectors() {
        for (r, p, w) in VECTORS {
            assert_eq!(weight(r, p), w, "weight({r:?}, {p:?})");
        }
    }

    #[test]
    fn owners_match_the_published_vectors() {
        let fleet = set(&["mtgauge-0", "mtgauge-1", "mtgauge-2"]);
        for (p, o) in OWNERS {
            assert_eq!(owner(p, &fleet), Some(o), "owner of {p:?}");
            assert_eq!(preference(p, &fleet)[0], o);
        }
    }

    #[test]
    fn owner_is_the_first_preference_and_independent_of_order() {
        let a = set(&["r0", "r1", "r2", "r3", "r4"]);
        let mut b = a.clone();
        b.reverse();
        for i in 0..2000 {
            let p = format!("producer-{i}");
            let o = owner(&p, &a).unwrap();
            assert_eq!(owner(&p, &b), Some(o));
            assert_eq!(preference(&p, &a)[0], o);
            assert_eq!(preference(&p, &a), preference(&p, &b));
        }
        assert_eq!(owner("x", &[]), None);
    }

    #[test]
    fn a_replica_that_leaves_moves_only_its_own_producers() {
        let full = set(&["r0", "r1", "r2"]);
        let without = set(&["r0", "r2"]);
        let mut moved = 0;
        let n = 3000;
        for i in 0..n {
            let p = format!("p{i}");
            let before = owner(&p, &full).unwrap();
            let after = owner(&p, &without).unwrap();
            if before == "r1" {
                moved += 1;
                // It goes to its second preference.
                assert_eq!(after, preference(&p, &full)[1]);
            } else {
                assert_eq!(before, after, "{p} moved although its replica stayed");
            }
        }
        // About a third of the producers were r1's: 3 binomial standard deviations (n = 3000,
        // p = 1/3: sd 25.8; common practice for such bounds).
        assert!((moved as f64 - n as f64 / 3.0).abs() < 3.0 * 25.8, "{moved} of {n} moved");
    }

    #[test]
    fn names_and_sets_are_checked() {
        assert!(check_name("mtgauge-0").is_ok() && check_name("a.b_c-9").is_ok());
        for bad in ["", "a b", "ü", "a/b", &"x".repeat(254)] {
            assert_eq!(check_name(bad), Err(NameError::Name(bad.to_owned())));
        }
        assert_eq!(check_set(&[]), Err(NameError::Size(0)));
        assert_eq!(check_set(&set(&["a", "b", "a"])), Err(NameError::Duplicate("a".into())));
        assert!(check_set(&set(&["a", "b"])).is_ok());
    }
}
