//! The gRPC service implementations. Each handler validates, hands CPU work to the blocking
//! pool, and applies results to [`State`] in short critical sections.

use std::cell::RefCell;
use std::collections::{BTreeMap, HashMap};
use std::pin::Pin;
use std::sync::Arc;
use std::time::{Duration, Instant};

use tokio::sync::{mpsc, watch};
use tokio_stream::wrappers::ReceiverStream;
use tokio_stream::Stream;
use tonic::{Request, Response, Status, Streaming};

use super::auth::{Scope, Tokens};
use super::error::{Result, ServiceError};
use super::limits::Limit;
use super::state::{unix_now, Committing, LoadedSet, Pending, ProducerClaim, State};
use crate::refs::RefFormat;
use super::watchers::Watchers;
use super::{ACK_BUFFER, DEFAULT_WATCH_SECONDS};
use crate::metric::CorpusStats;
use crate::pb;
use crate::metric::resample::{valid_level, DEFAULT_LEVEL};
use crate::guard::{GuardCounts, GuardScratch};
use crate::pb::convert::{
    config_from_pb, config_to_pb, guard_tally_to_pb, guard_verdict_to_pb, replicate_sums_to_pb, resampling_from_pb, resampling_to_pb, segment_scores_to_pb,
    totals_with_intervals,
};
use crate::refs::compiled::Scratch;
use crate::report::PROXY_NOTE;
use crate::session::{ItemKey, Outcome, Session};
use crate::telemetry;

/// Most files (reference streams plus source) of one upload.
pub const MAX_UPLOAD_FILES: usize = 64;

/// Batches of one stream scored ahead of their acknowledgement: while the oldest waits for its
/// group commit, the next ones are scored and queued behind it.
pub const PIPELINE_DEPTH: usize = 4;

/// Batches of at most this many items are scored on the async worker itself.
pub const INLINE_BATCH_ITEMS: usize = 256;

thread_local! {
    /// Scoring buffers of each blocking-pool thread, reused across batches.
    static SCRATCH: RefCell<Scratch> = RefCell::new(Scratch::default());
    /// Buffers of the reference-free guards, likewise.
    static GUARD_SCRATCH: RefCell<GuardScratch> = RefCell::new(GuardScratch::default());
}

/// All services over one state.
#[derive(Clone)]
pub struct Services {
    state: State,
    stop: watch::Receiver<bool>,
    tokens: Option<Arc<Tokens>>,
    max_message_bytes: usize,
    watchers: Watchers,
}

impl Services {
    /// The services over `state`, and the one watch publisher they share (so: call inside a
    /// Tokio runtime).
    pub fn new(state: State, stop: watch::Receiver<bool>, tokens: Option<Arc<Tokens>>, max_message_bytes: usize) -> Services {
        let watchers = Watchers::start(state.clone(), stop.clone(), |state, session, level| report(state, session, level, false));
        Services { state, stop, tokens, max_message_bytes, watchers }
    }

    /// Check the caller's token for `scope` (always passes without a tokens file).
    fn authorize<T>(&self, req: &Request<T>, scope: Scope) -> std::result::Result<(), Status> {
        match &self.tokens {
            Some(t) => t.check(req, scope).map_err(Status::from),
            None => Ok(()),
        }
    }
}

async fn blocking<T: Send + 'static>(f: impl FnOnce() -> Result<T> + Send + 'static) -> Result<T> {
    tokio::task::spawn_blocking(f).await.map_err(|e| ServiceError::Internal(e.to_string()))?
}

fn refset_info(state: &State, l: &LoadedSet) -> pb::RefSetInfo {
    let set = &l.set;
    pb::RefSetInfo {
        name: l.name.clone(),
        segments: set.len() as u64,
        references: set.reference_count() as u64,
        max_refs_per_segment: set.segments().map(|s| s.ref_count()).max().unwrap_or(0) as u32,
        memory_bytes: set.memory_bytes() as u64,
        digest: set.digest_hex(),
        with_source: set.segments().filter(|s| s.source().is_some()).count() as u64,
        sessions: state.sessions_using(set) as u64,
    }
}

fn session_info(s: &Session) -> pb::SessionInfo {
    let spec = s.spec();
    let counts = s.state().counts;
    pb::SessionInfo {
        name: spec.name.clone(),
        refset: spec.refset.clone(),
        refset_digest: s.refs().digest_hex(),
        config: Some(config_to_pb(&spec.config)),
        labels: spec.labels.iter().map(|(k, v)| (k.clone(), v.clone())).collect(),
        window: spec.window as u32,
        scored: counts.scored,
        unknown: counts.unknown,
        rejected: counts.rejected,
        created_unix: s.created_unix(),
        memory_bytes: s.memory_bytes() as u64,
        resampling: Some(resampling_to_pb(&spec.resampling)),
        target_language: spec.target_language.clone().unwrap_or_default(),
        guard_settings: spec.guard_settings.clone(),
        guard_setup: Some(crate::pb::convert::guard_setup_to_pb(s.guard_setup())),
        external: crate::pb::external::declaration_to_pb(&spec.external),
    }
}

fn format_from_pb(f: i32) -> Result<RefFormat> {
    match pb::RefFormat::try_from(f) {
        Ok(pb::RefFormat::Plain) => Ok(RefFormat::Plain),
        Ok(pb::RefFormat::Jsonl) => Ok(RefFormat::Jsonl),
        _ => Err(ServiceError::Invalid("format must be REF_FORMAT_PLAIN or REF_FORMAT_JSONL".into())),
    }
}

fn publish_refset(l: &LoadedSet) {
    telemetry::record_refset(&l.name, l.set.len(), l.set.memory_bytes());
    tracing::info!(refset = %l.name, segments = l.set.len(), digest = %l.set.digest_hex(), "reference set loaded");
}

#[tonic::async_trait]
impl pb::ref_sets_server::RefSets for Services {
    async fn load(&self, req: Request<pb::LoadRefSetRequest>) -> std::result::Result<Response<pb::RefSetInfo>, Status> {
        self.authorize(&req, Scope::Admin)?;
        let r = req.into_inner();
        let state = self.state.clone();
        let info = blocking(move || {
            crate::session::check_name("reference set name", &r.name)?;
            let format = format_from_pb(r.format)?;
            let read = |rel: &str| -> Result<(String, Vec<u8>)> {
                let full = state.resolve_refset_path(rel)?;
                let bytes = std::fs::read(&full).map_err(|e| ServiceError::Input(crate::refs::InputError::file(rel, e.to_string())))?;
                Ok((rel.to_owned(), bytes))
            };
            let files: Vec<(String, Vec<u8>)> = r.paths.iter().map(|p| read(p)).collect::<Result<_>>()?;
            let source = if r.source_path.is_empty() { None } else { Some(read(&r.source_path)?) };
            let set = state.parse_refset(format, &files, source.as_ref())?;
            let loaded = state.insert_refset(&r.name, set, r.replace)?;
            publish_refset(&loaded);
            Ok(refset_info(&state, &loaded))
        })
        .await?;
        Ok(Response::new(info))
    }

    async fn upload(&self, req: Request<Streaming<pb::UploadRefSetChunk>>) -> std::result::Result<Response<pb::RefSetInfo>, Status> {
        self.authorize(&req, Scope::Admin)?;
        let mut inbound = req.into_inner();
        let limit = self.state.limits().max_refset_bytes;
        let Some(first) = inbound.message().await? else { return Err(ServiceError::Invalid("empty upload".into()).into()) };
        let Some(pb::upload_ref_set_chunk::Part::Header(h)) = first.part else {
            return Err(ServiceError::Invalid("the first upload message must be the header".into()).into());
        };
        crate::session::check_name("reference set name", &h.name).map_err(ServiceError::from)?;
        let format = format_from_pb(h.format)?;
        let nfiles = h.files as usize + usize::from(h.has_source);
        if nfiles == 0 || nfiles > MAX_UPLOAD_FILES {
            return Err(ServiceError::Invalid(format!("header.files must be 1..{MAX_UPLOAD_FILES}, got {}", h.files)).into());
        }
        let mut files: Vec<Vec<u8>> = vec![Vec::new(); nfiles];
        let mut total = 0u64;
        while let Some(chunk) = inbound.message().await? {
            let Some(pb::upload_ref_set_chunk::Part::Data(d)) = chunk.part else {
                return Err(ServiceError::Invalid("only the first upload message may be a header".into()).into());
            };
            let slot = files.get_mut(d.file as usize).ok_or_else(|| ServiceError::Invalid(format!("data for file {} of {}", d.file, nfiles)))?;
            total += d.data.len() as u64;
            if total > limit {
                return Err(ServiceError::Limit { what: format!("upload of more than {total} bytes"), limit, key: Limit::MaxRefsetBytes.key() }.into());
            }
            slot.extend_from_slice(&d.data);
        }
        let state = self.state.clone();
        let info = blocking(move || {
            let mut named: Vec<(String, Vec<u8>)> = files.into_iter().enumerate().map(|(i, b)| (format!("{}[file {i}]", h.name), b)).collect();
            let source = if h.has_source { named.pop() } else { None };
            let set = state.parse_refset(format, &named, source.as_ref())?;
            let loaded = state.insert_refset(&h.name, set, h.replace)?;
            publish_refset(&loaded);
            Ok(refset_info(&state, &loaded))
        })
        .await?;
        Ok(Response::new(info))
    }

    async fn list(&self, req: Request<pb::ListRefSetsRequest>) -> std::result::Result<Response<pb::ListRefSetsResponse>, Status> {
        self.authorize(&req, Scope::Read)?;
        let refsets = self.state.refsets().iter().map(|l| refset_info(&self.state, l)).collect();
        Ok(Response::new(pb::ListRefSetsResponse { refsets }))
    }

    async fn describe(&self, req: Request<pb::DescribeRefSetRequest>) -> std::result::Result<Response<pb::RefSetInfo>, Status> {
        self.authorize(&req, Scope::Read)?;
        let l = self.state.refset(&req.into_inner().name)?;
        Ok(Response::new(refset_info(&self.state, &l)))
    }

    async fn delete(&self, req: Request<pb::DeleteRefSetRequest>) -> std::result::Result<Response<pb::DeleteRefSetResponse>, Status> {
        self.authorize(&req, Scope::Admin)?;
        let name = req.into_inner().name;
        self.state.delete_refset(&name)?;
        tracing::info!(refset = %name, "reference set deleted");
        Ok(Response::new(pb::DeleteRefSetResponse {}))
    }
}

#[tonic::async_trait]
impl pb::sessions_server::Sessions for Services {
    async fn create(&self, req: Request<pb::CreateSessionRequest>) -> std::result::Result<Response<pb::SessionInfo>, Status> {
        self.authorize(&req, Scope::Admin)?;
        let r = req.into_inner();
        let config = config_from_pb(r.config.as_ref()).map_err(|e| ServiceError::Invalid(e.0))?;
        let labels: BTreeMap<String, String> = r.labels.into_iter().collect();
        let mut spec = self.state.session_spec(&r.name, &r.refset, config, labels, r.window as usize, resampling_from_pb(r.resampling.as_ref()))?;
        spec.target_language = target_language_from_pb(&r.target_language)?;
        spec.guard_settings = r.guard_settings.iter().map(|s| s.trim().to_owned()).collect();
        crate::session::check_guard_settings(spec.target_language.as_deref(), &spec.guard_settings).map_err(|e| ServiceError::Invalid(e.to_string()))?;
        spec.external = crate::pb::external::declaration_from_pb(&r.external).map_err(|e| ServiceError::Invalid(e.0))?;
        let state = self.state.clone();
        let (session, created) = blocking(move || state.create_session(spec, r.if_not_exists)).await?;
        let spec = session.spec();
        if created {
            // Counters start at zero with the session (only then: an existing session's
            // counters are moved by its batches alone).
            telemetry::record_session_info(&spec.name, &spec.refset, &session.refs().digest_hex(), &spec.config.describe(), &spec.resampling.describe(), &spec.labels, true);
            telemetry::init_session(&spec.name, &spec.config, [0; 3], &CorpusStats::default());
            telemetry::record_guards(&spec.name, &GuardCounts::default(), true);
            telemetry::record_external(&spec.name, &spec.external, &crate::external::ExternalTotals::new(spec.external.len()));
        }
        tracing::info!(session = %spec.name, refset = %spec.refset, config = %spec.config.describe(), "session ready");
        Ok(Response::new(session_info(&session)))
    }

    async fn get(&self, req: Request<pb::GetSessionRequest>) -> std::result::Result<Response<pb::SessionInfo>, Status> {
        self.authorize(&req, Scope::Read)?;
        let s = self.state.session(&req.into_inner().name)?;
        Ok(Response::new(session_info(&s)))
    }

    async fn list(&self, req: Request<pb::ListSessionsRequest>) -> std::result::Result<Response<pb::ListSessionsResponse>, Status> {
        self.authorize(&req, Scope::Read)?;
        Ok(Response::new(pb::ListSessionsResponse { sessions: self.state.sessions().iter().map(|s| session_info(s)).collect() }))
    }

    async fn reset(&self, req: Request<pb::ResetSessionRequest>) -> std::result::Result<Response<pb::SessionInfo>, Status> {
        self.authorize(&req, Scope::Admin)?;
        let s = self.state.session(&req.into_inner().name)?;
        let state = self.state.clone();
        let s2 = Arc::clone(&s);
        blocking(move || state.reset_session(&s2)).await?;
        telemetry::record_scores(&s.spec().name, &s.spec().config, &CorpusStats::default(), &CorpusStats::default());
        tracing::info!(session = %s.spec().name, "session reset");
        Ok(Response::new(session_info(&s)))
    }

    async fn close(&self, req: Request<pb::CloseSessionRequest>) -> std::result::Result<Response<pb::CloseSessionResponse>, Status> {
        self.authorize(&req, Scope::Admin)?;
        let s = self.state.close_session(&req.into_inner().name)?;
        let spec = s.spec();
        telemetry::record_session_info(&spec.name, &spec.refset, &s.refs().digest_hex(), &spec.config.describe(), &spec.resampling.describe(), &spec.labels, false);
        tracing::info!(session = %spec.name, "session closed");
        Ok(Response::new(pb::CloseSessionResponse {}))
    }
}

/// Score one batch and apply it to its session; the one path of both `Stream` and `Submit`
/// (a stream runs the two halves apart: see [`Scoring::stream`]).
async fn process_batch(state: &State, batch: pb::ScoreBatch) -> Result<pb::BatchAck> {
    begin_batch(state, batch).await?.finish(state).await
}

/// A batch scored and handed to its session, and the acknowledgement it will get.
struct InFlight {
    ack: pb::BatchAck,
    /// None: answered already (a known duplicate).
    committing: Option<Committing>,
    started: Instant,
}

impl InFlight {
    /// Wait for the batch's effect and complete its acknowledgement.
    async fn finish(self, state: &State) -> Result<pb::BatchAck> {
        let InFlight { mut ack, committing, started } = self;
        let Some(c) = committing else { return Ok(ack) };
        match c.wait(state).await? {
            Some(effect) => {
                let b = effect.batch;
                (ack.scored, ack.unknown, ack.rejected) = (b.scored as u32, b.unknown as u32, b.rejected as u32);
                ack.guards = Some(guard_tally_to_pb(&b.guards));
            }
            None => {
                ack.duplicate = true;
                ack.external = 0;
                (ack.rejections, ack.segment_scores, ack.guard_verdicts) = (Vec::new(), Vec::new(), Vec::new());
            }
        }
        telemetry::record_batch_seconds(started.elapsed().as_secs_f64());
        Ok(ack)
    }
}

/// Validate and score a batch, and hand it to its session.
async fn begin_batch(state: &State, batch: pb::ScoreBatch) -> Result<InFlight> {
    let started = Instant::now();
    let session = state.session(&batch.session)?;
    state.fleet().check(&batch.producer, &batch.replicas)?;
    if batch.items.is_empty() {
        return Err(ServiceError::Invalid("empty batch: send at least one item".into()));
    }
    let limits = *state.limits();
    if batch.items.len() > limits.max_batch_items {
        return Err(ServiceError::Limit { what: format!("batch of {} items", batch.items.len()), limit: limits.max_batch_items as u64, key: Limit::MaxBatchItems.key() });
    }
    let mut ack = pb::BatchAck { session: batch.session.clone(), producer: batch.producer.clone(), sequence: batch.sequence, ..Default::default() };
    if session.state().is_duplicate(&batch.producer, batch.sequence) {
        ack.duplicate = true;
        return Ok(InFlight { ack, committing: None, started });
    }
    let scoring = Arc::clone(&session);
    let slot = state.scoring_slot().await;
    let inline = batch.items.len() <= INLINE_BATCH_ITEMS;
    let work = move || score_items(&scoring, &batch, &limits);
    // A small batch is scored right here (well under a millisecond: the runtime stays
    // responsive, see `mtgauge load`'s health probe); a large one on the blocking pool, which
    // costs two thread hand-offs.
    let scored = if inline { work()? } else { blocking(work).await? };
    drop(slot);

    let rejected = scored.rejections.len() as u64;
    ack.external = scored.external_items;
    let pending = Pending { session, producer: ack.producer.clone(), sequence: ack.sequence, outcomes: scored.outcomes, rejected, replicates: scored.replicates, guards: scored.guards, external: scored.external };
    let committing = state.submit_batch(pending)?;
    (ack.rejections, ack.segment_scores, ack.guard_verdicts) = (scored.rejections, scored.segment_scores, scored.verdicts);
    Ok(InFlight { ack, committing: Some(committing), started })
}

/// A batch after scoring, before it is applied.
struct ScoredItems {
    /// Outcomes of the valid items, in order.
    outcomes: Vec<Outcome>,
    /// Items refused, by index.
    rejections: Vec<pb::Rejection>,
    /// Per-segment scores, when the batch asked for them.
    segment_scores: Vec<pb::SegmentScore>,
    /// Replicate sums of the scored items (sessions with replicates).
    replicates: Option<crate::metric::resample::Replicates>,
    /// Guard counts of the items that carried a source.
    guards: GuardCounts,
    /// Per checked item, its guard verdict, when the batch asked for segment scores.
    verdicts: Vec<pb::GuardVerdict>,
    /// What the items' external values add (None: no item carried any).
    external: Option<crate::external::ExternalDelta>,
    /// Items whose external values are counted.
    external_items: u32,
}

/// An item's external values, checked, or the reason it is rejected.
fn external_values(session: &Session, item: &pb::ScoreItem) -> std::result::Result<Option<crate::external::ItemValues>, String> {
    if item.external.is_empty() {
        return Ok(None);
    }
    crate::pb::external::item_values(&session.spec().external, item).map(Some).map_err(|e| e.to_string())
}

/// The bytes that key an item's bootstrap weights for its external values: the producer's item
/// key when given, else the segment id or source text it names.
fn external_key(item: &pb::ScoreItem) -> Option<u64> {
    let bytes = match (&item.item_key, &item.key) {
        (k, _) if !k.is_empty() => k.as_bytes(),
        (_, Some(pb::score_item::Key::SegmentId(id))) => id.as_bytes(),
        (_, Some(pb::score_item::Key::Source(src))) => src.as_bytes(),
        (_, None) => return None,
    };
    Some(crate::metric::resample::segment_key(bytes))
}

/// Validate and score every item of a batch (CPU work, no lock taken); per-segment scores are
/// derived here, once.
fn score_items(session: &Session, batch: &pb::ScoreBatch, limits: &super::Limits) -> Result<ScoredItems> {
    let mut out = ScoredItems {
        outcomes: Vec::with_capacity(batch.items.len()),
        rejections: Vec::new(),
        segment_scores: Vec::new(),
        replicates: None,
        guards: GuardCounts::default(),
        verdicts: Vec::new(),
        external: None,
        external_items: 0,
    };
    let mut external = Vec::new();
    let too_long = |what: &str, len: usize| format!("{what} of {len} bytes exceeds {} ({})", Limit::MaxTextBytes.key(), limits.max_text_bytes);
    SCRATCH.with(|s| GUARD_SCRATCH.with(|g| {
        let scratch = &mut s.borrow_mut();
        let guard_scratch = &mut g.borrow_mut();
        // (item index, outcome index) of the scored-or-unknown items: 8 bytes an item, so a
        // large batch's list stays a small allocation (the keys are read again from the items).
        let mut guard_pending: Vec<(u32, u32)> = Vec::with_capacity(batch.items.len());
        for (i, item) in batch.items.iter().enumerate() {
            let index = i as u32;
            if item.item_key.len() > limits.max_text_bytes {
                out.rejections.push(pb::Rejection { index, reason: too_long("item_key", item.item_key.len()) });
                continue;
            }
            let values = match external_values(session, item) {
                Ok(v) => v,
                Err(reason) => {
                    out.rejections.push(pb::Rejection { index, reason });
                    continue;
                }
            };
            // An item marked values-only is counted for its external values alone.
            if item.values_only {
                let Some(v) = &values else {
                    out.rejections.push(pb::Rejection { index, reason: "values_only is set but the item carries no external values".into() });
                    continue;
                };
                if !item.hypothesis.is_empty() {
                    out.rejections.push(pb::Rejection { index, reason: "values_only is set but the item carries a hypothesis".into() });
                    continue;
                }
                if let Some(pb::score_item::Key::Source(src)) = &item.key {
                    if src.len() > limits.max_text_bytes {
                        out.rejections.push(pb::Rejection { index, reason: too_long("source", src.len()) });
                        continue;
                    }
                }
                match external_key(item) {
                    Some(k) => external.push((k, v.clone())),
                    None => out.rejections.push(pb::Rejection { index, reason: "an item with only external values needs an item_key (or a segment_id or source) to key its bootstrap weights".into() }),
                }
                continue;
            }
            let key = match &item.key {
                Some(pb::score_item::Key::SegmentId(id)) => ItemKey::Id(id),
                Some(pb::score_item::Key::Source(src)) if src.len() > limits.max_text_bytes => {
                    out.rejections.push(pb::Rejection { index, reason: too_long("source", src.len()) });
                    continue;
                }
                Some(pb::score_item::Key::Source(src)) => ItemKey::Source(src),
                None => {
                    out.rejections.push(pb::Rejection { index, reason: "item has neither segment_id nor source".into() });
                    continue;
                }
            };
            if item.hypothesis.len() > limits.max_text_bytes {
                out.rejections.push(pb::Rejection { index, reason: too_long("hypothesis", item.hypothesis.len()) });
                continue;
            }
            let outcome = session.score_item(key, &item.hypothesis, scratch);
            if let (true, Outcome::Scored { stats, by_source, index: seg }) = (batch.want_segment_scores, &outcome) {
                out.segment_scores.push(pb::SegmentScore { index, segment_id: session.segment_id(*by_source, *seg).to_owned(), scores: segment_scores_to_pb(stats, &session.spec().config) });
            }
            out.outcomes.push(outcome);
            if let (Some(v), Some(k)) = (values, external_key(item)) {
                external.push((k, v));
            }
            guard_pending.push((index, (out.outcomes.len() - 1) as u32));
        }
        // The guards after the scoring, in a loop of their own: each loop's code and tables stay
        // in the caches (verdicts do not depend on the order).
        for (index, o) in guard_pending {
            let item = &batch.items[index as usize];
            let key = match &item.key {
                Some(pb::score_item::Key::SegmentId(id)) => ItemKey::Id(id),
                Some(pb::score_item::Key::Source(src)) => ItemKey::Source(src),
                // Items without a key were rejected before scoring.
                None => continue,
            };
            if let Some(v) = session.guard_item(key, &out.outcomes[o as usize], &item.hypothesis, guard_scratch) {
                out.guards.add(v);
                if batch.want_segment_scores {
                    out.verdicts.push(guard_verdict_to_pb(index, v));
                }
            }
        }
    }));
    out.replicates = session.replicate_delta(&out.outcomes);
    out.external_items = external.len() as u32;
    if !external.is_empty() {
        out.external = Some(session.external_delta(&external).map_err(|e| ServiceError::Invalid(format!("batch refused: {e}")))?);
    }
    Ok(out)
}

/// Why a session that keeps replicates gives no interval for a window with segments.
const CUMULATIVE_PREDATES: &str = "no cumulative interval: the statistics were kept before this session kept replicates; reset the session to start them";
const RECENT_PREDATES: &str = "no recent interval yet: the window still holds segments kept before this session kept replicates";

/// A session's scores now, intervals at `level` (0: the default).
pub fn report(state: &State, session: &Session, level: f64, with_sums: bool) -> pb::ScoresReport {
    let spec = session.spec();
    let level = if level == 0.0 { DEFAULT_LEVEL } else { level };
    // Statistics and replicates are read under two short locks: a batch applied in between
    // makes them differ by that batch, which an interval (a range) tolerates.
    let (cumulative, recent, counts) = {
        let st = session.state();
        (st.cumulative, st.window.stats(), st.counts)
    };
    let (cum_reps, recent_reps) = session.replicates();
    let c = &spec.config;
    let mut notes = Vec::new();
    if spec.resampling.resamples > 0 {
        if cum_reps.is_none() && cumulative.segments > 0 {
            notes.push(CUMULATIVE_PREDATES);
        }
        if recent_reps.is_none() && recent.segments > 0 {
            notes.push(RECENT_PREDATES);
        }
    }
    let mut cumulative_totals = totals_with_intervals(&cumulative, c, cum_reps.as_ref(), level);
    let mut recent_totals = totals_with_intervals(&recent, c, recent_reps.as_ref(), level);
    if !spec.external.is_empty() {
        // External metrics: since creation or reset, and over the window of the last items that
        // carried values ([`crate::external::window`]).
        let ext = session.external();
        cumulative_totals.external = crate::pb::external::results_to_pb(&spec.external, &ext.totals, ext.replicates.as_ref(), level);
        let (totals, reps) = session.external_recent();
        recent_totals.external = crate::pb::external::results_to_pb(&spec.external, &totals, reps.as_ref(), level);
        if with_sums {
            for (results, reps) in [(&mut cumulative_totals.external, ext.replicates.as_ref()), (&mut recent_totals.external, reps.as_ref())] {
                for (m, r) in results.iter_mut().enumerate() {
                    r.replicate_sums = reps.map(|x| crate::pb::external::replicate_sums_to_pb(x, m));
                }
            }
        }
    }
    pb::ScoresReport {
        session: spec.name.clone(),
        refset_digest: session.refs().digest_hex(),
        config: Some(config_to_pb(c)),
        cumulative: Some(cumulative_totals),
        recent: Some(recent_totals),
        window: spec.window as u32,
        unknown: counts.unknown,
        rejected: counts.rejected,
        unix_time: unix_now(),
        note: PROXY_NOTE.to_owned(),
        interval_note: notes.join("; "),
        resampling: Some(resampling_to_pb(&spec.resampling)),
        alerts: state.alerts().of(&spec.name),
        guards: Some(guard_tally_to_pb(&counts.guards)),
        target_language: spec.target_language.clone().unwrap_or_default(),
        cumulative_sums: cum_reps.as_ref().filter(|_| with_sums).map(replicate_sums_to_pb),
        recent_sums: recent_reps.as_ref().filter(|_| with_sums).map(replicate_sums_to_pb),
    }
}

/// The declared target language of a create request: empty is none; a code must name a
/// language the guards know (its ISO 639-1 code is kept).
fn target_language_from_pb(code: &str) -> Result<Option<String>> {
    if code.trim().is_empty() {
        return Ok(None);
    }
    crate::guard::language(code).map(|l| Some(l.code.to_owned())).ok_or_else(|| ServiceError::Invalid(crate::guard::GuardError::UnknownLanguage(code.to_owned()).to_string()))
}

/// Compare two sessions over the segments both `recent` windows hold (CPU work: call from a
/// blocking thread).
fn compare_sessions(a: &Session, b: &Session, r: &pb::CompareRequest) -> Result<pb::CompareReport> {
    use crate::metric::compare::{CompareSettings, DEFAULT_TRIALS, MAX_TRIALS};
    let level = check_level(r.level)?;
    let settings = CompareSettings {
        resamples: r.resamples.map_or(crate::metric::resample::DAEMON_RESAMPLES, |n| n as usize),
        seed: r.seed.unwrap_or(crate::metric::resample::DEFAULT_RESAMPLE_SEED),
        level: if level == 0.0 { DEFAULT_LEVEL } else { level },
        trials: r.trials.map_or(DEFAULT_TRIALS, |n| n as usize),
    };
    if settings.resamples > crate::metric::resample::MAX_RESAMPLES || settings.trials > MAX_TRIALS {
        return Err(ServiceError::Invalid(format!("at most {} resamples and {MAX_TRIALS} trials", crate::metric::resample::MAX_RESAMPLES)));
    }
    let threads = std::thread::available_parallelism().map_or(1, |n| n.get());
    let p = super::compare::paired(a, b, &settings, threads)?;
    let c = p.comparison;
    let metrics = pb::convert::metric_comparisons_to_pb(&c);
    let external = super::compare::external(a, b, &settings, threads).iter().map(|(spec, x, note)| crate::pb::external::comparison_to_pb(spec, x, note)).collect();
    Ok(pb::CompareReport {
        session_a: a.spec().name.clone(),
        session_b: b.spec().name.clone(),
        refset_digest: a.refs().digest_hex(),
        config: Some(config_to_pb(&a.spec().config)),
        segments: c.segments,
        recent_a: p.recent_a,
        recent_b: p.recent_b,
        metrics,
        level: settings.level,
        resamples: settings.resamples as u32,
        trials: settings.trials as u32,
        seed: settings.seed,
        unix_time: unix_now(),
        note: PROXY_NOTE.to_owned(),
        external,
    })
}

/// A requested interval level: 0 (the default) or strictly between 0 and 1.
fn check_level(level: f64) -> Result<f64> {
    if level == 0.0 || valid_level(level) {
        Ok(level)
    } else {
        Err(ServiceError::Invalid(format!("level {level} is not strictly between 0 and 1")))
    }
}

/// Decrements the open-stream gauge however the stream ends.
struct StreamGauge;

impl StreamGauge {
    fn new() -> StreamGauge {
        telemetry::streams_delta(1.0);
        StreamGauge
    }
}

impl Drop for StreamGauge {
    fn drop(&mut self) {
        telemetry::streams_delta(-1.0);
    }
}

type BoxStream<T> = Pin<Box<dyn Stream<Item = std::result::Result<T, Status>> + Send>>;

#[tonic::async_trait]
impl pb::scoring_server::Scoring for Services {
    type StreamStream = BoxStream<pb::BatchAck>;
    type WatchScoresStream = BoxStream<pb::ScoresReport>;
    type RecentSegmentsStream = BoxStream<pb::SegmentChunk>;

    async fn stream(&self, req: Request<Streaming<pb::ScoreBatch>>) -> std::result::Result<Response<Self::StreamStream>, Status> {
        self.authorize(&req, Scope::Submit)?;
        let gate = self.state.enter_stream()?;
        let mut inbound = req.into_inner();
        let (tx, rx) = mpsc::channel(ACK_BUFFER);
        let state = self.state.clone();
        let mut stop = self.stop.clone();
        let max_message = self.max_message_bytes;
        tokio::spawn(async move {
            let _gate = gate;
            let _gauge = StreamGauge::new();
            // Batches scored and handed to their session, waiting for their effect, in order:
            // the next batch is scored while the previous ones commit.
            let (ahead_tx, mut ahead) = mpsc::channel::<std::result::Result<InFlight, Status>>(PIPELINE_DEPTH);
            let forward = {
                let state = state.clone();
                tokio::spawn(async move {
                    while let Some(next) = ahead.recv().await {
                        let out = match next {
                            Ok(f) => f.finish(&state).await.map_err(Status::from),
                            Err(s) => Err(s),
                        };
                        let failed = out.is_err();
                        if tx.send(out).await.is_err() || failed {
                            break;
                        }
                    }
                })
            };
            let mut claims: HashMap<(String, String), ProducerClaim> = HashMap::new();
            loop {
                // Stop only between batches: a batch that has arrived is scored and acknowledged.
                let next = tokio::select! {
                    biased;
                    _ = stop.wait_for(|s| *s) => break,
                    m = inbound.message() => m,
                };
                let batch = match next {
                    Ok(Some(b)) => b,
                    Ok(None) => break,
                    Err(status) => {
                        // A message past max_message_bytes: tell the client, by the key's name.
                        if let Some(s) = crate::server::error::name_message_limit(&status, max_message) {
                            let _ = ahead_tx.send(Err(s)).await;
                        }
                        tracing::debug!(%status, "scoring stream ended by the client");
                        break;
                    }
                };
                let key = (batch.session.clone(), batch.producer.clone());
                if !batch.producer.is_empty() && !claims.contains_key(&key) {
                    match state.claim_producer(&key.0, &key.1) {
                        Ok(c) => {
                            claims.insert(key, c);
                        }
                        Err(e) => {
                            let _ = ahead_tx.send(Err(e.into())).await;
                            break;
                        }
                    }
                }
                let begun = begin_batch(&state, batch).await.map_err(Status::from);
                let failed = begun.is_err();
                if ahead_tx.send(begun).await.is_err() || failed {
                    break;
                }
            }
            drop(ahead_tx);
            let _ = forward.await;
            drop(claims);
        });
        Ok(Response::new(Box::pin(ReceiverStream::new(rx))))
    }

    async fn submit(&self, req: Request<pb::ScoreBatch>) -> std::result::Result<Response<pb::BatchAck>, Status> {
        self.authorize(&req, Scope::Submit)?;
        if *self.stop.borrow() {
            return Err(ServiceError::ShuttingDown.into());
        }
        Ok(Response::new(process_batch(&self.state, req.into_inner()).await?))
    }

    async fn get_scores(&self, req: Request<pb::GetScoresRequest>) -> std::result::Result<Response<pb::ScoresReport>, Status> {
        self.authorize(&req, Scope::Read)?;
        let r = req.into_inner();
        let level = check_level(r.level)?;
        let s = self.state.session(&r.session)?;
        let state = self.state.clone();
        Ok(Response::new(blocking(move || Ok(report(&state, &s, level, r.with_replicate_sums))).await?))
    }

    async fn compare(&self, req: Request<pb::CompareRequest>) -> std::result::Result<Response<pb::CompareReport>, Status> {
        self.authorize(&req, Scope::Read)?;
        let r = req.into_inner();
        let (a, b) = (self.state.session(&r.session_a)?, self.state.session(&r.session_b)?);
        let slot = self.state.scoring_slot().await;
        let report = blocking(move || compare_sessions(&a, &b, &r)).await?;
        drop(slot);
        Ok(Response::new(report))
    }

    async fn recent_segments(&self, req: Request<pb::RecentSegmentsRequest>) -> std::result::Result<Response<Self::RecentSegmentsStream>, Status> {
        self.authorize(&req, Scope::Read)?;
        let session = self.state.session(&req.into_inner().session)?;
        let chunks = blocking(move || Ok(super::compare::segment_chunks(&session, super::compare::SEGMENT_CHUNK))).await?;
        Ok(Response::new(Box::pin(tokio_stream::iter(chunks.into_iter().map(Ok)))))
    }

    async fn identify(&self, req: Request<pb::IdentifyRequest>) -> std::result::Result<Response<pb::ReplicaIdentity>, Status> {
        // Any scope: producers (submit) and readers (read) both route by it.
        if self.authorize(&req, Scope::Read).is_err() {
            self.authorize(&req, Scope::Submit)?;
        }
        let f = self.state.fleet();
        Ok(Response::new(pb::ReplicaIdentity { replica: f.name.clone().unwrap_or_default(), fleet: f.members.clone(), version: env!("CARGO_PKG_VERSION").into() }))
    }

    async fn watch_scores(&self, req: Request<pb::WatchScoresRequest>) -> std::result::Result<Response<Self::WatchScoresStream>, Status> {
        self.authorize(&req, Scope::Read)?;
        let r = req.into_inner();
        let level = check_level(r.level)?;
        let session = self.state.session(&r.session)?;
        let gate = self.state.enter_watcher()?;
        let secs = if r.interval_seconds == 0 { DEFAULT_WATCH_SECONDS } else { r.interval_seconds };
        let rx = self.watchers.subscribe(session, Duration::from_secs(secs as u64), level, gate)?;
        Ok(Response::new(Box::pin(ReceiverStream::new(rx))))
    }
}
