//! The history tables: each session's time buckets ([`crate::session::history`]). Added after
//! schema 3 without a version change: the tables are created when a store opens, so a store
//! written before them loads with empty histories, and an older mtgauge ignores them.

use redb::{ReadableTable, TableDefinition};
use serde::{Deserialize, Serialize};

use crate::metric::CorpusStats;
use crate::external::ExternalTotals;
use crate::session::external_history::{ExternalBucket, ExternalHistoryWrite, StoredExternalBucket};
use crate::session::history::{HistoryWrite, Resolution, StoredBucket};
use crate::session::Counts;

use super::{decode_values, put_varint, BatchWrite};

/// (session, resolution code, bucket start) -> JSON of [`StoredStats`]: the bucket's statistics
/// and counters, rewritten by every group commit that adds to it.
pub(super) const HISTORY: TableDefinition<(&str, u8, u64), &[u8]> = TableDefinition::new("history_buckets");
/// (session, resolution code, bucket start) -> the bucket's replicate sums as LEB128 varints
/// (their count, then the sums), written once when the bucket closes.
pub(super) const HISTORY_SUMS: TableDefinition<(&str, u8, u64), &[u8]> = TableDefinition::new("history_sums");
/// (session, resolution code, bucket start) -> JSON of the bucket's external sums
/// ([`ExternalTotals`], one per declared metric), rewritten by every group commit that adds to
/// it ([`crate::session::external_history`]). Added after the built-in tables, the same way.
pub(super) const HISTORY_EXTERNAL: TableDefinition<(&str, u8, u64), &[u8]> = TableDefinition::new("history_external");

#[derive(Debug, Serialize, Deserialize)]
struct StoredStats {
    stats: CorpusStats,
    counts: Counts,
}

/// One table operation of a group commit.
pub(super) enum Op {
    /// Write a bucket's statistics.
    Stats(String, u8, u64, Vec<u8>),
    /// Write a closed bucket's sums.
    Sums(String, u8, u64, Vec<u8>),
    /// Remove buckets (and their sums) that start before.
    DropBefore(String, u8, u64),
    /// Remove sums of buckets that start before.
    DropSumsBefore(String, u8, u64),
    /// Write a bucket's external sums.
    External(String, u8, u64, Vec<u8>),
    /// Remove external buckets that start before.
    ExternalDropBefore(String, u8, u64),
}

fn key_start(t: i64) -> u64 {
    t.max(0) as u64
}

/// The operations of a group's history changes, in order (later writes of a bucket win).
pub(super) fn encode(writes: &[BatchWrite<'_>]) -> Result<Vec<Op>, serde_json::Error> {
    let mut ops = Vec::new();
    for w in writes {
        if let Some(h) = &w.applied.history {
            ops.extend(encode_one(w.session, h)?);
        }
        if let Some(h) = &w.applied.external_history {
            ops.extend(encode_external(w.session, h)?);
        }
    }
    Ok(ops)
}

fn encode_one(name: &str, h: &HistoryWrite) -> Result<Vec<Op>, serde_json::Error> {
    let mut ops = Vec::new();
    for (r, start, stats, counts) in &h.buckets {
        let bytes = serde_json::to_vec(&StoredStats { stats: *stats, counts: *counts })?;
        ops.push(Op::Stats(name.to_owned(), r.code(), key_start(*start), bytes));
    }
    for (r, start, sums) in &h.sums {
        let mut bytes = Vec::with_capacity(sums.len() * 3 + 3);
        put_varint(&mut bytes, sums.len() as u64);
        sums.iter().for_each(|&v| put_varint(&mut bytes, v));
        ops.push(Op::Sums(name.to_owned(), r.code(), key_start(*start), bytes));
    }
    ops.extend(h.dropped_before.iter().map(|(r, t)| Op::DropBefore(name.to_owned(), r.code(), key_start(*t))));
    ops.extend(h.sums_dropped_before.iter().map(|(r, t)| Op::DropSumsBefore(name.to_owned(), r.code(), key_start(*t))));
    Ok(ops)
}

fn encode_external(name: &str, h: &ExternalHistoryWrite) -> Result<Vec<Op>, serde_json::Error> {
    let mut ops = Vec::new();
    for (r, start, totals) in &h.buckets {
        ops.push(Op::External(name.to_owned(), r.code(), key_start(*start), serde_json::to_vec(totals)?));
    }
    ops.extend(h.dropped_before.iter().map(|(r, t)| Op::ExternalDropBefore(name.to_owned(), r.code(), key_start(*t))));
    Ok(ops)
}

/// Apply the operations in the group commit's transaction.
pub(super) fn apply(txn: &redb::WriteTransaction, ops: &[Op]) -> Result<(), redb::Error> {
    if ops.is_empty() {
        return Ok(());
    }
    let mut stats = txn.open_table(HISTORY)?;
    let mut sums = txn.open_table(HISTORY_SUMS)?;
    let mut external = txn.open_table(HISTORY_EXTERNAL)?;
    for op in ops {
        match op {
            Op::Stats(n, r, t, b) => {
                stats.insert((n.as_str(), *r, *t), b.as_slice())?;
            }
            Op::Sums(n, r, t, b) => {
                sums.insert((n.as_str(), *r, *t), b.as_slice())?;
            }
            Op::DropBefore(n, r, t) => {
                stats.retain_in((n.as_str(), *r, 0)..(n.as_str(), *r, *t), |_, _| false)?;
                sums.retain_in((n.as_str(), *r, 0)..(n.as_str(), *r, *t), |_, _| false)?;
            }
            Op::DropSumsBefore(n, r, t) => {
                sums.retain_in((n.as_str(), *r, 0)..(n.as_str(), *r, *t), |_, _| false)?;
            }
            Op::External(n, r, t, b) => {
                external.insert((n.as_str(), *r, *t), b.as_slice())?;
            }
            Op::ExternalDropBefore(n, r, t) => {
                external.retain_in((n.as_str(), *r, 0)..(n.as_str(), *r, *t), |_, _| false)?;
            }
        }
    }
    Ok(())
}

/// Remove a session's history (the session is deleted or created anew).
pub(super) fn clear(txn: &redb::WriteTransaction, name: &str) -> Result<(), redb::Error> {
    txn.open_table(HISTORY)?.retain_in((name, 0, 0)..=(name, u8::MAX, u64::MAX), |_, _| false)?;
    txn.open_table(HISTORY_SUMS)?.retain_in((name, 0, 0)..=(name, u8::MAX, u64::MAX), |_, _| false)?;
    txn.open_table(HISTORY_EXTERNAL)?.retain_in((name, 0, 0)..=(name, u8::MAX, u64::MAX), |_, _| false)?;
    Ok(())
}

/// A session's buckets as stored.
pub(super) fn load(stats: &impl ReadableTable<(&'static str, u8, u64), &'static [u8]>, sums: &impl ReadableTable<(&'static str, u8, u64), &'static [u8]>, name: &str) -> Result<Vec<StoredBucket>, String> {
    let mut out = Vec::new();
    for r in stats.range((name, 0, 0)..=(name, u8::MAX, u64::MAX)).map_err(|e| e.to_string())? {
        let (k, v) = r.map_err(|e| e.to_string())?;
        let (_, code, start) = k.value();
        let resolution = Resolution::from_code(code).ok_or_else(|| format!("history bucket of resolution {code}"))?;
        let st: StoredStats = serde_json::from_slice(v.value()).map_err(|e| format!("history bucket {start}: {e}"))?;
        let s = match sums.get((name, code, start)).map_err(|e| e.to_string())? {
            Some(b) => {
                let (n, values) = decode_values(b.value()).ok_or_else(|| format!("history sums {start} do not decode"))?;
                if values.len() as u64 != n {
                    return Err(format!("history sums {start}: {} values, {n} announced", values.len()));
                }
                Some(values)
            }
            None => None,
        };
        out.push(StoredBucket { resolution, start: start as i64, stats: st.stats, counts: st.counts, sums: s });
    }
    Ok(out)
}

/// A session's external buckets as stored.
pub(super) fn load_external(table: &impl ReadableTable<(&'static str, u8, u64), &'static [u8]>, name: &str) -> Result<Vec<StoredExternalBucket>, String> {
    let mut out = Vec::new();
    for r in table.range((name, 0, 0)..=(name, u8::MAX, u64::MAX)).map_err(|e| e.to_string())? {
        let (k, v) = r.map_err(|e| e.to_string())?;
        let (_, code, start) = k.value();
        let resolution = Resolution::from_code(code).ok_or_else(|| format!("external history bucket of resolution {code}"))?;
        let totals: ExternalTotals = serde_json::from_slice(v.value()).map_err(|e| format!("external history bucket {start}: {e}"))?;
        out.push(StoredExternalBucket { resolution, bucket: ExternalBucket { start: start as i64, totals } });
    }
    Ok(out)
}

#[cfg(test)]
mod tests {
    use std::sync::Arc;

    use super::*;
    use crate::metric::resample::Resampling;
    use crate::metric::ScoreConfig;
    use crate::refs::compiled::Scratch;
    use crate::refs::{RefSet, SegmentInput};
    use crate::session::history::HistoryConfig;
    use crate::session::{ItemKey, Session, SessionSpec};
    use crate::store::Store;

    fn dir(name: &str) -> std::path::PathBuf {
        let d = std::env::temp_dir().join(format!("mtgauge-history-{name}-{}", std::process::id()));
        let _ = std::fs::remove_dir_all(&d);
        d
    }

    /// Two segments of the invented ferry-notice scenario.
    fn session() -> Session {
        let seg = |id: &str, r: &str| SegmentInput { id: id.into(), source: None, refs: vec![r.into()] };
        let set = RefSet::new(vec![seg("1", "Die Fähre nach Tarnholm fährt um neun Uhr ab."), seg("2", "Bitte halten Sie Ihre Fahrkarte bereit.")]).unwrap();
        let spec = SessionSpec { name: "ferry".into(), refset: "notices".into(), config: ScoreConfig::default(), labels: Default::default(), window: 4, resampling: Resampling { resamples: 8, seed: 3 }, target_language: None, guard_settings: Vec::new(), external: Default::default() };
        Session::new(spec, Arc::new(set), 0)
    }

    /// Batches over three minutes written through group commits come back as the same
    /// history (statistics of every bucket, sums of the closed ones); the open minute has no
    /// interval after the reload. A store written before the history tables existed loads with
    /// an empty history.
    #[test]
    fn history_survives_a_reopen_and_old_stores_load_without_it() {
        let d = dir("reopen");
        let s = session();
        let t0 = 1_800_000_000;
        {
            let st = Store::open(&d).unwrap();
            st.put_refset("notices", s.refs()).unwrap();
            st.put_session(s.spec(), &s.refs().digest_hex(), 0).unwrap();
            let mut scratch = Scratch::default();
            for (i, hyp) in ["Die Fähre fährt um neun Uhr ab.", "Bitte halten Sie die Karte bereit.", "Die Fähre nach Tarnholm fährt um neun Uhr ab.", "Halten Sie Ihre Fahrkarte bereit."].iter().enumerate() {
                let o = s.score_item(ItemKey::Id(if i % 2 == 0 { "1" } else { "2" }), hyp, &mut scratch);
                let applied = s.apply_at(t0 + 50 * i as i64, "p", i as u64 + 1, &[o], 0, None, &Default::default()).unwrap();
                st.commit_batches(&[crate::store::BatchWrite { session: "ferry", applied: &applied }]).unwrap();
            }
        }
        let want = s.history().query(t0, t0 + 240, 60).unwrap().1;
        assert_eq!(want.iter().map(|x| x.stats.segments).collect::<Vec<_>>(), vec![2, 1, 1, 0]);
        let st = Store::open(&d).unwrap();
        let snap = st.load().unwrap();
        let loaded = &snap.sessions[0];
        assert_eq!(loaded.history.iter().filter(|b| b.resolution == Resolution::Minute).count(), 3);
        let back = session();
        back.restore_history(HistoryConfig::default(), loaded.history.clone()).unwrap();
        let got = back.history().query(t0, t0 + 240, 60).unwrap().1;
        for (g, w) in got.iter().zip(&want) {
            assert_eq!((g.start, g.stats, g.counts), (w.start, w.stats, w.counts));
        }
        assert!(got[0].sums.is_some() && got[0].sums == want[0].sums && got[1].sums == want[1].sums, "closed minutes keep their sums");
        assert!(want[2].sums.is_some() && got[2].sums.is_none(), "the minute open at the reload has no interval");
        // The hour was open: statistics, no sums.
        let hour = back.history().query(t0, t0 + 3600, 3600).unwrap().1;
        assert_eq!(hour[0].stats.segments, 4);
        assert!(hour[0].sums.is_none());
        drop(st);

        // A store from before the history tables: drop them, reopen (they are created empty).
        {
            let db = redb::Database::create(d.join(crate::store::STORE_FILE)).unwrap();
            let txn = db.begin_write().unwrap();
            assert!(txn.delete_table(HISTORY).unwrap() && txn.delete_table(HISTORY_SUMS).unwrap());
            txn.commit().unwrap();
        }
        let st = Store::open(&d).unwrap();
        let snap = st.load().unwrap();
        assert_eq!(snap.sessions.len(), 1);
        assert!(snap.sessions[0].history.is_empty());
        assert_eq!(snap.sessions[0].counts.scored, 4, "the rest of the session is intact");
        // Deleting the session removes its history.
        st.delete_session("ferry").unwrap();
        use redb::{ReadableDatabase, ReadableTableMetadata};
        let txn = st.db.begin_read().unwrap();
        assert!(txn.open_table(HISTORY).unwrap().is_empty().unwrap());
    }

    /// External sums written through group commits over three minutes come back as the same
    /// external history (every step at both resolutions), and go when the session is deleted.
    #[test]
    fn external_history_survives_a_reopen() {
        let d = dir("external");
        let with_external = || {
            let s = session();
            let mut spec = s.spec().clone();
            spec.external = crate::external::Declaration::new(vec![crate::external::ExternalSpec::new("qe", 0.0, 1.0).unwrap()]).unwrap();
            Session::new(spec, Arc::clone(s.refs()), 0)
        };
        let s = with_external();
        let t0 = 1_800_000_000;
        {
            let st = Store::open(&d).unwrap();
            st.put_refset("notices", s.refs()).unwrap();
            st.put_session(s.spec(), &s.refs().digest_hex(), 0).unwrap();
            for (i, v) in [0.25, 0.5, 0.75, 0.125, 0.875].iter().enumerate() {
                let mut applied = s.apply_at(t0 + 40 * i as i64, "p", i as u64 + 1, &[], 0, None, &Default::default()).unwrap();
                let d = s.external_delta(&[(i as u64, s.spec().external.check_item([("qe", *v)]).unwrap())]).unwrap();
                s.apply_external(&d).unwrap();
                applied.external_history = Some(s.record_external(t0 + 40 * i as i64, &d.totals).unwrap());
                st.commit_batches(&[crate::store::BatchWrite { session: "ferry", applied: &applied }]).unwrap();
            }
        }
        let st = Store::open(&d).unwrap();
        let loaded = st.load().unwrap().sessions.remove(0);
        let back = with_external();
        back.restore_external_history(HistoryConfig::default(), loaded.external_history).unwrap();
        for step in [60, 3600] {
            let want = s.external_history().query(t0, t0 + 3600, step).unwrap();
            assert_eq!(back.external_history().query(t0, t0 + 3600, step).unwrap(), want, "step {step}");
            assert_eq!(want.1.iter().map(|(_, t)| t.0[0].count).sum::<u64>(), 5);
        }
        st.delete_session("ferry").unwrap();
        use redb::{ReadableDatabase, ReadableTableMetadata};
        assert!(st.db.begin_read().unwrap().open_table(HISTORY_EXTERNAL).unwrap().is_empty().unwrap());
    }
}
