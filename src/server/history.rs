//! The history call: a session's score over time from its history buckets
//! ([`crate::session::history`]), for the gRPC `History` service and the status page alike.

use std::sync::Arc;

use tonic::{Request, Response, Status};

use super::auth::{Scope, Tokens};
use super::error::{Result, ServiceError};
use super::state::{unix_now, State};
use crate::external::{MEAN_INTERVAL_LEVEL, MEAN_INTERVAL_METHOD};
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

/// What a history request reads: a built-in metric, or a declared external metric (its index).
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Series {
    /// A built-in metric.
    Builtin(Metric),
    /// An external metric, by its place in the session's declaration.
    External(usize),
}

fn builtin_names(session: &Session) -> String {
    Metric::ALL.into_iter().filter(|m| session.spec().config.has(*m)).map(Metric::name).collect::<Vec<_>>().join(", ")
}

/// The series a request names: a built-in metric the session scores (empty: the first), else
/// one of its declared external metrics; an error naming the metric and what the session has.
pub fn series_of(session: &Session, name: &str) -> Result<Series> {
    let spec = session.spec();
    let builtin = match name {
        "" => Metric::ALL.into_iter().find(|m| spec.config.has(*m)),
        n => Metric::ALL.into_iter().find(|m| m.name() == n),
    };
    if let Some(m) = builtin.filter(|m| spec.config.has(*m)) {
        return Ok(Series::Builtin(m));
    }
    if let Some(i) = spec.external.index(name) {
        return Ok(Series::External(i));
    }
    let declared: Vec<&str> = spec.external.specs().iter().map(|s| s.name.as_str()).collect();
    let external = if declared.is_empty() { "none declared".to_owned() } else { declared.join(", ") };
    Err(ServiceError::Invalid(format!("session '{}' has no metric '{}' (built-in: {}; external: {external})", spec.name, name.escape_debug(), builtin_names(session))))
}

/// The steps of external metric `m`: per step the mean of the values that arrived in it (in
/// the metric's own units) as `score`, their count as `segments`, and the normal-theory
/// interval of the mean ([`crate::external::MEAN_INTERVAL_METHOD`]) from the summed count, sum
/// and squares; `unknown` and `rejected` are 0.
pub fn external_points(session: &Session, m: usize, from: i64, until: i64, step: i64) -> Result<(Resolution, Vec<Point>)> {
    let (resolution, steps) = external_steps(session, m, from, until, step)?;
    let spec = &session.spec().external.specs()[m];
    Ok((resolution, steps.iter().map(|(start, sums)| external_point(spec, *start, sums)).collect()))
}

/// A step of an external metric from its summed count, sum and squares: the mean, the count
/// and the normal-theory interval of the mean.
pub fn external_point(spec: &crate::external::ExternalSpec, start: i64, sums: &crate::external::ExternalSums) -> Point {
    let interval = sums.mean_interval(spec.decimals).map(|(low, high)| Interval { level: MEAN_INTERVAL_LEVEL, low, high, resamples: 0, method: MEAN_INTERVAL_METHOD, seed: 0 });
    Point { start, segments: sums.count, score: sums.mean(spec.decimals), interval, unknown: 0, rejected: 0 }
}

/// The summed count, sum and squares of external metric `m` in each step.
fn external_steps(session: &Session, m: usize, from: i64, until: i64, step: i64) -> Result<(Resolution, Vec<(i64, crate::external::ExternalSums)>)> {
    session.spec().external.specs().get(m).ok_or_else(|| ServiceError::Internal(format!("external metric {m} of session '{}'", session.spec().name)))?;
    let (resolution, steps) = session.external_history().query(from, until, step).map_err(|e| ServiceError::Invalid(e.to_string()))?;
    Ok((resolution, steps.iter().map(|(start, totals)| (*start, totals.0[m])).collect()))
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
        external: None,
    }
}

/// A step of an external metric in an API message (no statistics or replicate sums).
fn external_point_to_pb(p: Point, sums: Option<pb::ExternalResult>) -> pb::HistoryPoint {
    pb::HistoryPoint { start_unix: p.start, segments: p.segments, score: p.score, interval: p.interval.map(pb::convert::interval_to_pb), unknown: 0, rejected: 0, totals: None, sums: None, external: sums }
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
fn query_of(session: &Session, r: &pb::GetHistoryRequest, now: i64) -> Result<(Series, HistoryQuery)> {
    let series = series_of(session, &r.metric)?;
    let metric = match series {
        Series::Builtin(m) => m,
        // Unused for an external series.
        Series::External(_) => Metric::Bleu,
    };
    let step = if r.step_seconds == 0 { DEFAULT_HISTORY_STEP_SECS } else { i64::from(r.step_seconds) };
    let until = if r.until_unix == 0 { now } else { r.until_unix };
    let from = if r.from_unix == 0 { until - DEFAULT_HISTORY_STEPS * step } else { r.from_unix };
    let level = match r.level {
        0.0 => DEFAULT_LEVEL,
        l if valid_level(l) => l,
        l => return Err(ServiceError::Invalid(format!("level {l} is not strictly between 0 and 1"))),
    };
    if matches!(series, Series::External(_)) && level != MEAN_INTERVAL_LEVEL {
        return Err(ServiceError::Invalid(format!("the history of external metric '{}' has intervals at level {MEAN_INTERVAL_LEVEL} only (leave level at 0)", r.metric.escape_debug())));
    }
    Ok((series, HistoryQuery { metric, from, until, step, level }))
}

#[tonic::async_trait]
impl pb::history_server::History for HistoryService {
    async fn get_history(&self, req: Request<pb::GetHistoryRequest>) -> std::result::Result<Response<pb::HistoryReport>, Status> {
        if let Some(t) = &self.tokens {
            t.check(&req, Scope::Read)?;
        }
        let r = req.into_inner();
        let session = self.state.session(&r.session)?;
        let (series, q) = query_of(&session, &r, unix_now())?;
        let report = tokio::task::spawn_blocking(move || -> Result<pb::HistoryReport> {
            let config = &session.spec().config;
            if let Series::External(m) = series {
                let (resolution, steps) = external_steps(&session, m, q.from, q.until, q.step)?;
                let spec = &session.spec().external.specs()[m];
                let points: Vec<pb::HistoryPoint> = steps
                    .iter()
                    .map(|(start, sums)| external_point_to_pb(external_point(spec, *start, sums), r.with_sums.then(|| crate::pb::external::result_to_pb(spec, sums, None, MEAN_INTERVAL_LEVEL))))
                    .collect();
                return Ok(pb::HistoryReport {
                    session: session.spec().name.clone(),
                    metric: r.metric.clone(),
                    from_unix: points.first().map_or(q.from, |p| p.start_unix),
                    until_unix: q.until,
                    step_seconds: q.step as u32,
                    resolution: resolution.name().into(),
                    points,
                    config: Some(pb::convert::config_to_pb(config)),
                    refset_digest: session.refs().digest_hex(),
                    memory_bytes: session.external_history().memory_bytes() as u64,
                });
            }
            let (resolution, steps) = steps(&session, &q)?;
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
