//! The history call: a session's score over time from its history buckets
//! ([`crate::session::history`]), for the gRPC `History` service and the status page alike.

use std::sync::Arc;

use tonic::{Request, Response, Status};

use super::auth::{Scope, Tokens};
use super::error::{Result, ServiceError};
use super::state::{unix_now, State};
use crate::metric::resample::{valid_level, Interval, DEFAULT_LEVEL};
use crate::metric::scores::corpus_score;
use crate::metric::Metric;
use crate::pb;
use crate::metric::ScoreConfig;
use crate::session::history::{Resolution, Step};
use crate::session::Session;

/// Steps of a query that gives no start.
pub const DEFAULT_HISTORY_STEPS: i64 = 60;
/// Seconds per step unless asked.
pub const DEFAULT_HISTORY_STEP_SECS: i64 = 60;

/// What to read of a session's history.
#[derive(Debug, Clone, Copy)]
pub struct HistoryQuery {
    /// The metric.
    pub metric: Metric,
    /// Start (moved back to a bucket boundary).
    pub from: i64,
    /// End, exclusive.
    pub until: i64,
    /// Seconds per step.
    pub step: i64,
    /// Confidence level.
    pub level: f64,
}

/// One step of a session's score over time.
#[derive(Debug, Clone, serde::Serialize)]
pub struct Point {
    /// Start of the step.
    pub start: i64,
    /// Segments scored in it.
    pub segments: u64,
    /// The score of its summed statistics (None without segments).
    pub score: Option<f64>,
    /// Its interval, when its buckets keep replicate sums.
    pub interval: Option<Interval>,
    /// Items that named no segment.
    pub unknown: u64,
    /// Items rejected as invalid.
    pub rejected: u64,
}

/// The metric a request names (empty: the session's first configured one).
pub fn metric_of(session: &Session, name: &str) -> Result<Metric> {
    let config = &session.spec().config;
    let m = match name {
        "" => Metric::ALL.into_iter().find(|m| config.has(*m)),
        n => Metric::ALL.into_iter().find(|m| m.name() == n),
    };
    m.filter(|m| config.has(*m)).ok_or_else(|| ServiceError::Invalid(format!("session '{}' does not score metric '{}'", session.spec().name, name.escape_debug())))
}

/// Read the steps: the buckets' sums are copied under the history's lock, the scores and
/// intervals derived after it (CPU work: call from a blocking thread).
pub fn points(session: &Session, q: &HistoryQuery) -> Result<(Resolution, Vec<Point>)> {
    let (resolution, steps) = steps(session, q)?;
    Ok((resolution, steps.iter().map(|s| point_of(s, &session.spec().config, q)).collect()))
}

/// The summed buckets of each step.
fn steps(session: &Session, q: &HistoryQuery) -> Result<(Resolution, Vec<Step>)> {
    session.history().query(q.from, q.until, q.step).map_err(|e| ServiceError::Invalid(e.to_string()))
}

/// A step's score, interval and counts.
pub fn point_of(s: &Step, config: &ScoreConfig, q: &HistoryQuery) -> Point {
    Point {
        start: s.start,
        segments: s.stats.segments,
        score: (s.stats.segments > 0).then(|| corpus_score(&s.stats, config, q.metric)).flatten(),
        interval: s.sums.as_ref().and_then(|r| r.interval(q.metric, q.level)),
        unknown: s.counts.unknown,
        rejected: s.counts.rejected,
    }
}

/// A step in an API message; with `with_sums`, its statistics and replicate sums too.
fn point_to_pb(s: &Step, config: &ScoreConfig, q: &HistoryQuery, with_sums: bool) -> pb::HistoryPoint {
    let p = point_of(s, config, q);
    pb::HistoryPoint {
        start_unix: p.start,
        segments: p.segments,
        score: p.score,
        interval: p.interval.map(pb::convert::interval_to_pb),
        unknown: p.unknown,
        rejected: p.rejected,
        totals: with_sums.then(|| pb::convert::totals_to_pb(&s.stats, config)),
        sums: s.sums.as_ref().filter(|_| with_sums).map(pb::convert::replicate_sums_to_pb),
    }
}

/// The gRPC `History` service.
#[derive(Clone)]
pub struct HistoryService {
    state: State,
    tokens: Option<Arc<Tokens>>,
}

impl HistoryService {
    /// The service over `state`, checking `tokens` when given.
    pub fn new(state: State, tokens: Option<Arc<Tokens>>) -> HistoryService {
        HistoryService { state, tokens }
    }
}

/// The query a request asks for, with its defaults filled in at `now`.
fn query_of(session: &Session, r: &pb::GetHistoryRequest, now: i64) -> Result<HistoryQuery> {
    let metric = metric_of(session, &r.metric)?;
    let step = if r.step_seconds == 0 { DEFAULT_HISTORY_STEP_SECS } else { i64::from(r.step_seconds) };
    let until = if r.until_unix == 0 { now } else { r.until_unix };
    let from = if r.from_unix == 0 { until - DEFAULT_HISTORY_STEPS * step } else { r.from_unix };
    let level = match r.level {
        0.0 => DEFAULT_LEVEL,
        l if valid_level(l) => l,
        l => return Err(ServiceError::Invalid(format!("level {l} is not strictly between 0 and 1"))),
    };
    Ok(HistoryQuery { metric, from, until, step, level })
}

#[tonic::async_trait]
impl pb::history_server::History for HistoryService {
    async fn get_history(&self, req: Request<pb::GetHistoryRequest>) -> std::result::Result<Response<pb::HistoryReport>, Status> {
        if let Some(t) = &self.tokens {
            t.check(&req, Scope::Read)?;
        }
        let r = req.into_inner();
        let session = self.state.session(&r.session)?;
        let q = query_of(&session, &r, unix_now())?;
        let report = tokio::task::spawn_blocking(move || -> Result<pb::HistoryReport> {
            let (resolution, steps) = steps(&session, &q)?;
            let config = &session.spec().config;
            Ok(pb::HistoryReport {
                session: session.spec().name.clone(),
                metric: q.metric.name().into(),
                from_unix: steps.first().map_or(q.from, |p| p.start),
                until_unix: q.until,
                step_seconds: q.step as u32,
                resolution: resolution.name().into(),
                points: steps.iter().map(|s| point_to_pb(s, config, &q, r.with_sums)).collect(),
                config: Some(pb::convert::config_to_pb(config)),
                refset_digest: session.refs().digest_hex(),
                memory_bytes: session.history().memory_bytes() as u64,
            })
        })
        .await
        .map_err(|e| ServiceError::Internal(e.to_string()))??;
        Ok(Response::new(report))
    }
}
