//! The daemon's alert evaluator: one task owns every (rule, session) tracker
//! ([`crate::alerts::rules`]), evaluates all rules every `alert_eval_seconds` on a blocking
//! thread, and publishes each pair's state: as gauges (`mtgauge_alert_firing`,
//! `mtgauge_alert_state`), in the session's reports (`alerts`), and as a log event when an alert
//! fires or resolves.

use std::collections::HashMap;
use std::sync::{Arc, Mutex};
use std::time::Duration;

use tokio::sync::watch;

use super::state::{unix_now, State};
use crate::alerts::deliver::{AlertEvent, DeliveryHandle};
use crate::alerts::rules::{Condition, Measured, Rule, State as AlertState, Tracker, Transition, Window};
use crate::alerts::shift::Cusum;
use crate::metric::resample::Replicates;
use crate::metric::{CorpusStats, Metric};
use crate::metric::compare::{difference_interval, CompareSettings};
use crate::metric::resample::DEFAULT_LEVEL;
use crate::metric::scores::corpus_score;
use crate::pb;
use crate::session::Session;
use crate::telemetry;

/// The states of every (rule, session) pair as last evaluated, by session name, with the
/// spans during which alerts fired and the thresholds of the `below` rules: what reports and
/// the status page show. Written only by the evaluator.
#[derive(Clone, Default)]
pub struct AlertBoard {
    inner: Arc<Mutex<Board>>,
}

#[derive(Default)]
struct Board {
    states: HashMap<String, Vec<pb::AlertStatus>>,
    spans: HashMap<String, std::collections::VecDeque<AlertSpan>>,
    thresholds: HashMap<String, Vec<Threshold>>,
}

/// Spans of firing a session keeps (the oldest go first): in memory, since the daemon started.
pub const MAX_ALERT_SPANS: usize = 64;

/// A time during which a rule's alert fired on a session.
#[derive(Debug, Clone, PartialEq, serde::Serialize)]
pub struct AlertSpan {
    /// The rule's name.
    pub rule: String,
    /// When it fired (seconds since the Unix epoch).
    pub from: i64,
    /// When it resolved; None while it fires.
    pub until: Option<i64>,
}

/// The threshold of a `below` rule that selects a session.
#[derive(Debug, Clone, PartialEq)]
pub struct Threshold {
    /// The rule's name.
    pub rule: String,
    /// The metric it judges.
    pub metric: Metric,
    /// Its threshold, 0-100.
    pub value: f64,
}

impl AlertBoard {
    fn lock(&self) -> std::sync::MutexGuard<'_, Board> {
        self.inner.lock().unwrap_or_else(|e| e.into_inner())
    }

    /// The alerts of a session, by rule name.
    pub fn of(&self, session: &str) -> Vec<pb::AlertStatus> {
        self.lock().states.get(session).cloned().unwrap_or_default()
    }

    /// The spans during which alerts fired on a session, oldest first (at most
    /// [`MAX_ALERT_SPANS`]; an open one is firing now).
    pub fn spans_of(&self, session: &str) -> Vec<AlertSpan> {
        self.lock().spans.get(session).map(|d| d.iter().cloned().collect()).unwrap_or_default()
    }

    /// The thresholds of the `below` rules that select a session.
    pub fn thresholds_of(&self, session: &str) -> Vec<Threshold> {
        self.lock().thresholds.get(session).cloned().unwrap_or_default()
    }

    /// Note a rule's transition on a session at `now`.
    fn record(&self, rule: &str, session: &str, change: Transition, now: i64) {
        let mut b = self.lock();
        let spans = b.spans.entry(session.to_owned()).or_default();
        match change {
            Transition::Fired => {
                if spans.len() == MAX_ALERT_SPANS {
                    spans.pop_front();
                }
                spans.push_back(AlertSpan { rule: rule.to_owned(), from: now, until: None });
            }
            Transition::Resolved => {
                if let Some(open) = spans.iter_mut().rev().find(|s| s.rule == rule && s.until.is_none()) {
                    open.until = Some(now);
                }
            }
        }
    }

    fn publish(&self, states: HashMap<String, Vec<pb::AlertStatus>>, thresholds: HashMap<String, Vec<Threshold>>) {
        let mut b = self.lock();
        // A session no rule judges any more (closed, say) keeps no spans.
        b.spans.retain(|session, _| states.contains_key(session));
        b.states = states;
        b.thresholds = thresholds;
    }
}

/// Seconds between two posts of a firing alert to the targets: Alertmanager ends an alert it
/// has not heard of for its resolve timeout (5 minutes by default), so a firing alert is sent
/// again well within it (common practice: once a minute).
pub const RESEND_SECONDS: i64 = 60;

/// A (rule, session) pair as the evaluator keeps it.
#[derive(Debug, Clone)]
pub struct Pair {
    tracker: Tracker,
    /// When the alert last fired (its startsAt) and when it was last posted.
    fired_at: i64,
    posted_at: i64,
    /// `decline` rules: the test, and the session's cumulative statistics and replicate sums
    /// where the current chunk began.
    cusum: Cusum,
    chunk_start: Option<(CorpusStats, Replicates)>,
    /// Time-window rules: the session's cumulative statistics as seen at past evaluations, and
    /// the baseline session's (`drop`).
    history: History,
    baseline_history: History,
    /// The same for rules on an external metric.
    ext_chunk_start: Option<crate::external::ExternalState>,
    ext_history: History<crate::external::ExternalState>,
    ext_baseline_history: History<crate::external::ExternalState>,
}

impl Pair {
    fn new(now: i64) -> Pair {
        Pair { tracker: Tracker::new(now), fired_at: now, posted_at: now, cusum: Cusum::default(), chunk_start: None, history: History::default(), baseline_history: History::default(), ext_chunk_start: None, ext_history: History::default(), ext_baseline_history: History::default() }
    }
}

/// Points a time window's history keeps (about; one more at its far edge): a window's start
/// is known to within 1/30 of its length (30 s of 15 minutes). Each point holds a copy of the
/// session's cumulative replicate sums (R x fields x 8 bytes: 46 KB at R = 200 for bleu + chrf).
pub const HISTORY_POINTS: u64 = 30;

/// What a time window is cut from: a session's cumulative sums (with their replicate sums),
/// from which an earlier copy can be subtracted.
pub trait Cumulative: Clone {
    /// Empty sums of the same shape.
    fn empty_like(&self) -> Self;
    /// Items counted.
    fn count(&self) -> u64;
    /// Whether `o` has the same shape (configuration, replicates, seed).
    fn same_shape(&self, o: &Self) -> bool;
    /// `self - o` (o part of self); None on a mismatch.
    fn minus(&self, o: &Self) -> Option<Self>;
}

impl Cumulative for (CorpusStats, Replicates) {
    fn empty_like(&self) -> Self {
        (CorpusStats::default(), Replicates::new(self.1.config(), self.1.resamples(), self.1.seed()))
    }
    fn count(&self) -> u64 {
        self.0.segments
    }
    fn same_shape(&self, o: &Self) -> bool {
        o.1.config() == self.1.config() && o.1.resamples() == self.1.resamples() && o.1.seed() == self.1.seed()
    }
    fn minus(&self, o: &Self) -> Option<Self> {
        let (mut s, mut r) = self.clone();
        s -= o.0;
        r.subtract(&o.1).ok()?;
        Some((s, r))
    }
}

impl Cumulative for crate::external::ExternalState {
    fn empty_like(&self) -> Self {
        let resampling = self.replicates.as_ref().map(|r| (r.resamples(), r.seed()));
        crate::external::ExternalState::new(self.totals.0.len(), resampling)
    }
    fn count(&self) -> u64 {
        self.totals.0.iter().map(|t| t.count).sum()
    }
    fn same_shape(&self, o: &Self) -> bool {
        let resampling = o.replicates.as_ref().map(|r| (r.resamples(), r.seed()));
        self.fits(o.totals.0.len(), resampling)
    }
    fn minus(&self, o: &Self) -> Option<Self> {
        let totals = self.totals.0.iter().zip(&o.totals.0).map(|(a, b)| a.checked_sub(b).ok()).collect::<Option<Vec<_>>>()?;
        let replicates = match (&self.replicates, &o.replicates) {
            (Some(a), Some(b)) => {
                let mut r = a.clone();
                r.subtract(b).ok()?;
                Some(r)
            }
            (None, None) => None,
            _ => return None,
        };
        Some(crate::external::ExternalState { totals: crate::external::ExternalTotals(totals), replicates })
    }
}

/// A session's cumulative sums at past evaluations, for a time window: the window's part is
/// the cumulative now minus the cumulative at the newest point at least the window's length
/// old. Until the evaluator has watched a session for that long, the window starts where it
/// began watching, or at the session's creation (or reset) when that is within the window.
#[derive(Debug, Clone)]
pub struct History<T = (CorpusStats, Replicates)> {
    points: std::collections::VecDeque<(i64, T)>,
}

impl<T> Default for History<T> {
    fn default() -> Self {
        History { points: std::collections::VecDeque::new() }
    }
}

impl<T: Cumulative> History<T> {
    /// Take the cumulative `now_sums` at `now` and return the part of the last `seconds`.
    pub fn window(&mut self, now: i64, seconds: u64, created_unix: i64, now_sums: T) -> T {
        let reset = self.points.back().is_some_and(|(_, old)| old.count() > now_sums.count() || !old.same_shape(&now_sums));
        if reset {
            // Reset (or recreated): the session starts over about now.
            self.points.clear();
            self.points.push_back((now, now_sums.empty_like()));
        } else if self.points.is_empty() && created_unix > now - seconds as i64 {
            // Created within the window: all of its life is in it.
            self.points.push_back((created_unix, now_sums.empty_like()));
        }
        let spacing = (seconds / HISTORY_POINTS).max(1) as i64;
        if self.points.back().is_none_or(|(t, _)| now - t >= spacing) {
            self.points.push_back((now, now_sums.clone()));
        }
        let edge = now - seconds as i64;
        while self.points.len() >= 2 && self.points[1].0 <= edge {
            self.points.pop_front();
        }
        now_sums.minus(&self.points[0].1).unwrap_or_else(|| now_sums.empty_like())
    }
}

/// Start evaluating `rules` every `every` until `stop` turns true (inside a Tokio runtime);
/// firing and resolved alerts go to `delivery`.
pub fn start(state: State, rules: Vec<Rule>, every: Duration, board: AlertBoard, delivery: Option<Arc<DeliveryHandle>>, mut stop: watch::Receiver<bool>) {
    if rules.is_empty() {
        return;
    }
    let rules = Arc::new(rules);
    tokio::spawn(async move {
        let mut trackers: HashMap<(String, String), Pair> = HashMap::new();
        let mut tick = tokio::time::interval(every.max(Duration::from_secs(1)));
        tick.set_missed_tick_behavior(tokio::time::MissedTickBehavior::Skip);
        loop {
            tokio::select! {
                _ = stop.wait_for(|s| *s) => break,
                _ = tick.tick() => {}
            }
            let (st, r, b, d) = (state.clone(), Arc::clone(&rules), board.clone(), delivery.clone());
            let owned = std::mem::take(&mut trackers);
            match tokio::task::spawn_blocking(move || evaluate(&st, &r, owned, &b, d.as_deref(), unix_now())).await {
                Ok(t) => trackers = t,
                Err(e) => tracing::error!(error = %e, "alert evaluation failed"),
            }
        }
    });
}

/// One round over every rule and every session it selects; returns the trackers (pairs whose
/// session went away are dropped).
pub fn evaluate(state: &State, rules: &[Rule], mut trackers: HashMap<(String, String), Pair>, board: &AlertBoard, delivery: Option<&DeliveryHandle>, now: i64) -> HashMap<(String, String), Pair> {
    let mut next = HashMap::new();
    let mut views: HashMap<String, Vec<pb::AlertStatus>> = HashMap::new();
    let mut thresholds: HashMap<String, Vec<Threshold>> = HashMap::new();
    for session in state.sessions() {
        let spec = session.spec();
        for rule in rules.iter().filter(|r| r.selects(&spec.name, &spec.labels)) {
            let key = (rule.name.clone(), spec.name.clone());
            let mut p = trackers.remove(&key).unwrap_or_else(|| Pair::new(now));
            let m = measure(state, rule, &session, &mut p, now);
            // The clock of `for_segments`: segments scored, or for a rule on an external metric
            // the values it counted.
            let scored = match &rule.external {
                Some(name) => spec.external.index(name).and_then(|m| session.external_totals().0.get(m).map(|t| t.count)).unwrap_or(0),
                None => session.state().cumulative.segments,
            };
            let change = p.tracker.step(rule, m, now, scored);
            if let Some(change) = change {
                log_transition(rule, &spec.name, change, m);
                board.record(&rule.name, &spec.name, change, now);
            }
            if let (Condition::Below { threshold }, None) = (&rule.condition, &rule.external) {
                let threshold = *threshold;
                thresholds.entry(spec.name.clone()).or_default().push(Threshold { rule: rule.name.clone(), metric: rule.metric, value: threshold });
            }
            if change == Some(Transition::Fired) {
                p.fired_at = now;
            }
            let resend = p.tracker.state == AlertState::Firing && now - p.posted_at >= RESEND_SECONDS;
            if let (Some(d), true) = (delivery, change.is_some() || resend) {
                d.send(event(rule, &session, &p, change == Some(Transition::Resolved), now));
                p.posted_at = now;
            }
            telemetry::record_alert(&rule.name, &spec.name, p.tracker.state.name(), &AlertState::ALL.map(AlertState::name));
            views.entry(spec.name.clone()).or_default().push(view(rule, &p.tracker));
            next.insert(key, p);
        }
    }
    // Pairs that are gone (session closed) stop firing in the gauges, and at the targets.
    for ((rule, session), p) in trackers {
        if let (Some(d), AlertState::Firing, Some(r)) = (delivery, p.tracker.state, rules.iter().find(|r| r.name == rule)) {
            d.send(closed_event(r, &session, &p, now));
        }
        telemetry::record_alert(&rule, &session, AlertState::Inactive.name(), &AlertState::ALL.map(AlertState::name));
    }
    board.publish(views, thresholds);
    next
}

fn at(unix: i64) -> std::time::SystemTime {
    std::time::UNIX_EPOCH + Duration::from_secs(unix.max(0) as u64)
}

/// The labels of a (rule, session) alert: its identity at the targets.
fn labels(rule: &Rule, session: &str) -> std::collections::BTreeMap<String, String> {
    let mut l = rule.extra_labels.clone();
    l.insert("alertname".into(), rule.name.clone());
    l.insert("session".into(), session.to_owned());
    l.insert("severity".into(), rule.severity.clone());
    l.insert("metric".into(), rule.metric_label());
    l
}

/// The alert as posted: firing (with its latest measurement) or resolved at `now`.
fn event(rule: &Rule, session: &Session, p: &Pair, resolved: bool, now: i64) -> AlertEvent {
    let mut annotations = rule.annotations.clone();
    let measured = p.tracker.last.map_or_else(|| "nothing to judge by".to_owned(), |m| format!("{:.2} (95% interval {:.2} .. {:.2}, {} segments)", m.value, m.low, m.high, m.segments));
    annotations.entry("summary".into()).or_insert_with(|| format!("{}: {} on session {}", rule.name, describe(rule), session.spec().name));
    annotations.insert("measured".into(), measured);
    annotations.insert("description".into(), rule.description());
    AlertEvent { labels: labels(rule, &session.spec().name), annotations, starts_at: at(p.fired_at), ends_at: resolved.then(|| at(now)), generator_url: String::new() }
}

/// A firing alert whose session was closed: resolved at `now`.
fn closed_event(rule: &Rule, session: &str, p: &Pair, now: i64) -> AlertEvent {
    let annotations = [("summary".to_owned(), format!("{}: session {session} was closed", rule.name))].into();
    AlertEvent { labels: labels(rule, session), annotations, starts_at: at(p.fired_at), ends_at: Some(at(now)), generator_url: String::new() }
}

/// What the rule judges by, now (None: nothing to judge by).
fn measure(state: &State, rule: &Rule, session: &Session, p: &mut Pair, now: i64) -> Option<Measured> {
    if let Condition::FlagRate { guard, .. } = &rule.condition {
        return flag_rate(session, guard);
    }
    if let Some(name) = &rule.external {
        return external(state, rule, name, session, p, now);
    }
    let config = &session.spec().config;
    if !config.has(rule.metric) {
        return None;
    }
    match (&rule.condition, rule.window) {
        (Condition::Decline { points }, _) => decline(rule, session, p, *points),
        (Condition::FlagRate { guard, .. }, _) => flag_rate(session, guard),
        (Condition::Below { .. }, Window::Recent) => {
            let stats = session.state().window.stats();
            let (_, recent) = session.replicates();
            let i = recent?.interval(rule.metric, DEFAULT_LEVEL)?;
            Some(Measured { value: corpus_score(&stats, config, rule.metric)?, low: i.low, high: i.high, segments: stats.segments, statistic: None, higher_is_worse: false })
        }
        (Condition::Drop { baseline, .. }, Window::Recent) => {
            let base = state.session(baseline).ok()?;
            if let Some(((sa, ra), (sb, rb))) = super::compare::same_segments(session, &base) {
                // What `paired` would sum, read from the windows' own sums (exactly equal).
                let i = difference_interval(&ra, &rb, rule.metric, DEFAULT_LEVEL)?;
                let value = corpus_score(&sa, config, rule.metric).unwrap_or(0.0) - corpus_score(&sb, config, rule.metric).unwrap_or(0.0);
                return Some(Measured { value, low: i.low, high: i.high, segments: sa.segments, statistic: None, higher_is_worse: false });
            }
            let r = session.spec().resampling;
            let settings = CompareSettings { resamples: r.resamples, seed: r.seed, level: DEFAULT_LEVEL, trials: 0 };
            let p = super::compare::paired(session, &base, &settings, 1).ok()?;
            let m = p.comparison.get(rule.metric)?;
            let i = m.interval?;
            Some(Measured { value: m.difference, low: i.low, high: i.high, segments: p.comparison.segments, statistic: None, higher_is_worse: false })
        }
        (Condition::Below { .. }, w) => {
            let (stats, reps) = windowed(session, w, &mut p.history, now)?;
            let i = reps.interval(rule.metric, DEFAULT_LEVEL)?;
            Some(Measured { value: corpus_score(&stats, config, rule.metric)?, low: i.low, high: i.high, segments: stats.segments, statistic: None, higher_is_worse: false })
        }
        (Condition::Drop { baseline, .. }, w) => {
            // Each session's window on its own, paired through the replicates: the same
            // segment has the same weights in both, whichever window it falls in.
            let base = state.session(baseline).ok()?;
            if base.refs().digest() != session.refs().digest() || base.spec().config != *config {
                return None;
            }
            let (sa, ra) = windowed(session, w, &mut p.history, now)?;
            let (sb, rb) = windowed(&base, w, &mut p.baseline_history, now)?;
            let i = difference_interval(&ra, &rb, rule.metric, DEFAULT_LEVEL)?;
            rb.interval(rule.metric, DEFAULT_LEVEL)?;
            let value = corpus_score(&sa, config, rule.metric)? - corpus_score(&sb, config, rule.metric)?;
            Some(Measured { value, low: i.low, high: i.high, segments: sa.segments.min(sb.segments), statistic: None, higher_is_worse: false })
        }
    }
}

/// A `flag-rate` rule: the guard's flagged share of the items it decided on since start, with
/// its Wilson interval, in percent (`segments`: the decided items).
fn flag_rate(session: &Session, guard: &str) -> Option<Measured> {
    let g = crate::guard::Guard::ALL.into_iter().find(|g| g.name() == guard)?;
    let counts = session.state().counts.guards;
    let decided = counts.checked.saturating_sub(counts.undecided_by(g));
    let flagged = counts.flagged_by(g);
    let (low, high) = crate::alerts::rules::wilson(flagged, decided, crate::alerts::rules::WILSON_Z95)?;
    Some(Measured { value: 100.0 * flagged as f64 / decided as f64, low: 100.0 * low, high: 100.0 * high, segments: decided, statistic: None, higher_is_worse: false })
}

/// A session's statistics and replicate sums over `window` (`all` or a time window).
fn windowed(session: &Session, window: Window, history: &mut History, now: i64) -> Option<(CorpusStats, Replicates)> {
    let (stats, reps) = session.cumulative_with_replicates();
    let reps = reps?;
    match window {
        Window::Last(seconds) => Some(history.window(now, seconds, session.created_unix(), (stats, reps))),
        // The same history with the session's segment count for a clock.
        Window::Segments(n) => {
            let count = stats.segments as i64;
            Some(history.window(count, n, 0, (stats, reps)))
        }
        _ => Some((stats, reps)),
    }
}

/// A `decline` rule: close a chunk once `min_segments` new segments were scored and feed it to
/// the test; between chunks, the last measurement stands.
fn decline(rule: &Rule, session: &Session, p: &mut Pair, points: f64) -> Option<Measured> {
    let config = &session.spec().config;
    let (stats, reps) = session.cumulative_with_replicates();
    let reps = reps?;
    let Some((start, start_reps)) = &p.chunk_start else {
        p.chunk_start = Some((stats, reps));
        return p.tracker.last;
    };
    if stats.segments < start.segments {
        // The session was reset: start over.
        (p.cusum, p.chunk_start) = (Cusum::default(), Some((stats, reps)));
        return None;
    }
    if stats.segments - start.segments < rule.min_segments {
        return p.tracker.last;
    }
    let mut chunk = stats;
    chunk -= *start;
    let mut chunk_reps = reps.clone();
    chunk_reps.subtract(start_reps).ok()?;
    p.chunk_start = Some((stats, reps));
    let x = corpus_score(&chunk, config, rule.metric)?;
    let scores = chunk_reps.scores(rule.metric)?;
    let mean = scores.iter().sum::<f64>() / scores.len().max(1) as f64;
    let se = (scores.iter().map(|s| (s - mean) * (s - mean)).sum::<f64>() / (scores.len().max(2) - 1) as f64).sqrt();
    let step = p.cusum.observe(x, se, points);
    // The chunk's score with a normal-approximation 95% range (1.96 standard errors), and the
    // test statistic (None while the baseline is being learned).
    Some(Measured { value: x, low: x - 1.96 * se, high: x + 1.96 * se, segments: chunk.segments, statistic: step.map(|s| s.statistic), higher_is_worse: false })
}

/// A session's external metric `m` over `window`: its sums and replicate sums (None: the
/// session keeps no replicates).
fn external_window(session: &Session, m: usize, window: Window, history: &mut History<crate::external::ExternalState>, now: i64) -> Option<(crate::external::ExternalSums, crate::external::replicates::ExternalReplicates)> {
    let (totals, reps) = match window {
        Window::Recent => session.external_recent(),
        Window::All => {
            let e = session.external();
            (e.totals, e.replicates)
        }
        Window::Last(seconds) => {
            let e = history.window(now, seconds, session.created_unix(), session.external());
            (e.totals, e.replicates)
        }
        Window::Segments(n) => {
            let e = session.external();
            let count = e.totals.0.get(m).map_or(0, |t| t.count) as i64;
            let e = history.window(count, n, 0, e);
            (e.totals, e.replicates)
        }
    };
    Some((*totals.0.get(m)?, reps?))
}

/// A rule on an external metric: the mean of its values (over the rule's window) with the
/// percentile interval of the replicate means (`below`), the difference of two sessions' means
/// with the interval of the replicate differences, each item weighted alike in both by its key
/// (`drop`), or the CUSUM over chunks of `min_segments` values (`decline`).
fn external(state: &State, rule: &Rule, name: &str, session: &Session, p: &mut Pair, now: i64) -> Option<Measured> {
    let specs = session.spec().external.specs();
    let m = session.spec().external.index(name)?;
    let spec = &specs[m];
    let (d, worse_high) = (spec.decimals, !spec.higher_is_better);
    let measured = |value: f64, (low, high): (f64, f64), segments: u64| Measured { value, low, high, segments, statistic: None, higher_is_worse: worse_high };
    match &rule.condition {
        Condition::Below { .. } => {
            let (sums, reps) = external_window(session, m, rule.window, &mut p.ext_history, now)?;
            let i = reps.interval(m, d, DEFAULT_LEVEL)?;
            Some(measured(sums.mean(d)?, (i.low, i.high), sums.count))
        }
        Condition::Drop { baseline, .. } => {
            let base = state.session(baseline).ok()?;
            let bm = base.spec().external.index(name)?;
            let bspec = &base.spec().external.specs()[bm];
            if bspec.decimals != d || bspec.higher_is_better != spec.higher_is_better {
                return None;
            }
            let (sa, ra) = external_window(session, m, rule.window, &mut p.ext_history, now)?;
            let (sb, rb) = external_window(&base, bm, rule.window, &mut p.ext_baseline_history, now)?;
            if ra.resamples() != rb.resamples() || ra.seed() != rb.seed() {
                return None;
            }
            let scale = 10f64.powi(d as i32);
            let mut diffs: Vec<f64> = (0..ra.resamples())
                .filter_map(|r| {
                    let ((ca, xa), (cb, xb)) = (ra.replicate(m, r)?, rb.replicate(bm, r)?);
                    (ca > 0 && cb > 0).then(|| (xa as f64 / ca as f64 - xb as f64 / cb as f64) / scale)
                })
                .collect();
            let iv = crate::metric::compare::symmetric_interval(&mut diffs, DEFAULT_LEVEL)?;
            Some(measured(sa.mean(d)? - sb.mean(d)?, iv, sa.count.min(sb.count)))
        }
        Condition::Decline { points } => {
            let now_state = session.external();
            let Some(start) = &p.ext_chunk_start else {
                p.ext_chunk_start = Some(now_state);
                return p.tracker.last;
            };
            let (n_now, n_start) = (now_state.totals.0.get(m)?.count, start.totals.0.get(m)?.count);
            if n_now < n_start || !now_state.same_shape(start) {
                // The session was reset: start over.
                (p.cusum, p.ext_chunk_start) = (Cusum::default(), Some(now_state));
                return None;
            }
            if n_now - n_start < rule.min_segments {
                return p.tracker.last;
            }
            let chunk = now_state.minus(start)?;
            p.ext_chunk_start = Some(now_state);
            let sums = chunk.totals.0[m];
            let means = chunk.replicates.as_ref()?.means(m, d);
            let mean = means.iter().sum::<f64>() / means.len().max(1) as f64;
            let se = (means.iter().map(|x| (x - mean) * (x - mean)).sum::<f64>() / (means.len().max(2) - 1) as f64).sqrt();
            let x = sums.mean(d)?;
            // The test looks for a fall: a lower-is-better metric is fed negated.
            let step = p.cusum.observe(if worse_high { -x } else { x }, se, *points);
            Some(Measured { statistic: step.map(|s| s.statistic), ..measured(x, (x - 1.96 * se, x + 1.96 * se), sums.count) })
        }
        Condition::FlagRate { .. } => None,
    }
}

/// The condition in words.
pub fn describe(rule: &Rule) -> String {
    rule.describe()
}

fn view(rule: &Rule, t: &Tracker) -> pb::AlertStatus {
    pb::AlertStatus {
        rule: rule.name.clone(),
        state: t.state.name().to_owned(),
        since_unix: t.since,
        condition: describe(rule),
        value: t.last.map(|m| m.value),
        low: t.last.map(|m| m.low),
        high: t.last.map(|m| m.high),
        segments: t.last.map_or(0, |m| m.segments),
        severity: rule.severity.clone(),
        statistic: t.last.and_then(|m| m.statistic),
    }
}

fn log_transition(rule: &Rule, session: &str, change: Transition, m: Option<Measured>) {
    let (value, high) = (m.map(|m| m.value), m.map(|m| m.high));
    match change {
        Transition::Fired => tracing::warn!(alert = %rule.name, session, severity = %rule.severity, condition = %describe(rule), ?value, ?high, "alert firing"),
        Transition::Resolved => tracing::info!(alert = %rule.name, session, condition = %describe(rule), ?value, ?high, "alert resolved"),
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::refs::compiled::Scratch;
    use crate::refs::{RefSet, SegmentInput};
    use crate::rng::SplitMix64;
    use crate::session::ItemKey;

    const WORDS: &[&str] = &["die", "Fähre", "nach", "Kiel", "fährt", "heute", "um", "neun", "Uhr", "ab", "Deck", "sieben", "bleibt", "geschlossen", "bitte", "Ticket", "bereithalten"];

    /// A session fed chunks of 60 segments, first close to the references, then with most words
    /// dropped, then close again: a `decline` rule learns its baseline (BASELINE_CHUNKS chunks),
    /// fires on the drop within a few chunks, and resolves after it; a stable run never fires.
    #[test]
    fn a_decline_rule_fires_on_a_drop_and_resolves_after() {
        let mut rng = SplitMix64::new(3);
        let segments: Vec<SegmentInput> = (0..2000)
            .map(|i| SegmentInput { id: format!("s{i}"), source: None, refs: vec![(0..12).map(|_| WORDS[rng.index(WORDS.len())]).collect::<Vec<_>>().join(" ")] })
            .collect();
        let state = State::new(None, crate::server::Limits::default()).unwrap();
        state.insert_refset("ferry", RefSet::new(segments.clone()).unwrap(), false).unwrap();
        let spec = state.session_spec("watched", "ferry", Default::default(), Default::default(), 0, Default::default()).unwrap();
        let (session, _) = state.create_session(spec, false).unwrap();
        let toml_rule = "name = \"decline\"\nsession = \"watched\"\nwhen = \"decline\"\npoints = 3\nmin_segments = 60\nfor_seconds = 0";
        let rules = crate::alerts::rules::check_rules(&[toml::from_str(toml_rule).unwrap()]).unwrap();
        let board = AlertBoard::default();
        let mut trackers = HashMap::new();
        let mut scratch = Scratch::default();
        let mut states = Vec::new();
        // The drop starts once the baseline is learned (and the first evaluation, which only
        // marks where the first chunk starts), and lasts 10 chunks; the statistic, capped at
        // twice its limit, needs about 2h / k chunks to come back to 0 after it.
        let start = crate::alerts::shift::MIN_BASELINE_CHUNKS + 15;
        let drop_chunks = start..start + 10;
        for chunk in 0..start + 100 {
            // During the drop, 60% of the words are dropped instead of 10%.
            let drop = if drop_chunks.contains(&chunk) { 0.6 } else { 0.1 };
            let outcomes: Vec<_> = (0..60)
                .map(|_| {
                    let seg = &segments[rng.index(segments.len())];
                    let hyp: Vec<&str> = seg.refs[0].split(' ').filter(|_| !rng.chance(drop)).collect();
                    session.score_item(ItemKey::Id(&seg.id), &hyp.join(" "), &mut scratch)
                })
                .collect();
            session.apply("", 0, &outcomes, 0, None).unwrap();
            trackers = evaluate(&state, &rules, trackers, &board, None, chunk as i64);
            states.push(board.of("watched")[0].state.clone());
        }
        let first_firing = states.iter().position(|s| s == "firing");
        assert!(states[..start].iter().all(|s| s == "inactive"), "no alarm while stable: {states:?}");
        assert!(first_firing.is_some_and(|f| (start..start + 4).contains(&f)), "fires within a few chunks of the drop: {states:?}");
        assert_eq!(states.last().map(String::as_str), Some("inactive"), "resolves after the drop: {states:?}");
    }

    /// Rules from TOML tables, checked.
    fn checked(tables: Vec<toml::Value>) -> Vec<Rule> {
        let entries: Vec<crate::alerts::rules::RuleEntry> = tables.into_iter().map(|v| v.try_into().unwrap()).collect();
        crate::alerts::rules::check_rules(&entries).unwrap()
    }

    fn ferry_state(n: usize, sessions: &[&str]) -> (State, Vec<SegmentInput>, Vec<Arc<Session>>) {
        let mut rng = SplitMix64::new(11);
        let segments: Vec<SegmentInput> = (0..n)
            .map(|i| SegmentInput { id: format!("s{i}"), source: None, refs: vec![(0..12).map(|_| WORDS[rng.index(WORDS.len())]).collect::<Vec<_>>().join(" ")] })
            .collect();
        let state = State::new(None, crate::server::Limits::default()).unwrap();
        state.insert_refset("ferry", RefSet::new(segments.clone()).unwrap(), false).unwrap();
        let sessions = sessions
            .iter()
            .map(|name| {
                let spec = state.session_spec(name, "ferry", Default::default(), Default::default(), 0, Default::default()).unwrap();
                state.create_session(spec, false).unwrap().0
            })
            .collect();
        (state, segments, sessions)
    }

    /// Score `count` segments on `session`, each keeping its reference words with chance `1 - drop`.
    fn feed(session: &Session, segments: &[SegmentInput], rng: &mut SplitMix64, count: usize, drop: f64) {
        let mut scratch = Scratch::default();
        let outcomes: Vec<_> = (0..count)
            .map(|_| {
                let seg = &segments[rng.index(segments.len())];
                let hyp: Vec<&str> = seg.refs[0].split(' ').filter(|_| !rng.chance(drop)).collect();
                session.score_item(ItemKey::Id(&seg.id), &hyp.join(" "), &mut scratch)
            })
            .collect();
        session.apply("", 0, &outcomes, 0, None).unwrap();
    }

    /// A time-window rule judges what was scored in the last that long (to within the
    /// history's spacing); `all` judges everything since creation; a reset starts the window
    /// over; a `drop` rule over a time window pairs the two sessions' windows.
    #[test]
    fn time_windows_judge_the_segments_of_their_last_minutes() {
        let (state, segments, sessions) = ferry_state(3000, &["cand", "prod"]);
        let rule = |name: &str, window: &str, rest: &str| -> toml::Value { toml::from_str(&format!("name = \"{name}\"\nwindow = \"{window}\"\nmin_segments = 100\nfor_seconds = 0\n{rest}")).unwrap() };
        let rules = checked(vec![
            rule("floor-5m", "5m", "session = \"cand\"\nwhen = \"below\"\nthreshold = 50"),
            rule("floor-all", "all", "session = \"cand\"\nwhen = \"below\"\nthreshold = 50"),
            rule("worse-5m", "5m", "session = \"cand\"\nwhen = \"drop\"\nbaseline = \"prod\"\npoints = 10"),
        ]);
        let board = AlertBoard::default();
        let mut trackers = HashMap::new();
        let mut rng = SplitMix64::new(5);
        let created = sessions[0].created_unix();
        let of = |board: &AlertBoard, rule: &str| board.of("cand").into_iter().find(|a| a.rule == rule).unwrap();
        let mut first_5m = None;
        // 10 minutes good (10% of the words dropped), then 10 minutes bad (60%), 60 segments
        // every 10 s on both sessions; production stays good.
        for step in 0..=120i64 {
            let now = created + 10 * step;
            feed(&sessions[0], &segments, &mut rng, 60, if step > 60 { 0.6 } else { 0.1 });
            feed(&sessions[1], &segments, &mut rng, 60, 0.1);
            trackers = evaluate(&state, &rules, trackers, &board, None, now);
            let (w, a, d) = (of(&board, "floor-5m"), of(&board, "floor-all"), of(&board, "worse-5m"));
            if step <= 60 {
                assert!(w.state == "inactive" && a.state == "inactive" && d.state == "inactive", "step {step}: {w:?} {a:?} {d:?}");
            }
            if (31..=90).contains(&step) {
                // The window holds the 30 batches after the point at its edge (10 s apart).
                assert_eq!(w.segments, 30 * 60, "step {step}");
            }
            if step == 90 {
                assert_eq!(w.state, "firing", "after 5 minutes of bad output the 5m window is all bad: {w:?}");
                assert_eq!(d.state, "firing", "{d:?}");
                assert_eq!(a.state, "inactive", "everything since creation is still mostly good: {a:?}");
                assert_eq!(a.segments, 91 * 60);
            }
            if w.state == "firing" && first_5m.is_none() {
                first_5m = Some(step);
            }
        }
        assert!(first_5m.is_some_and(|s| s > 61 && s <= 90), "{first_5m:?}");
        // A reset starts every window over.
        sessions[0].reset();
        let now = created + 1220;
        feed(&sessions[0], &segments, &mut rng, 60, 0.1);
        trackers = evaluate(&state, &rules, trackers, &board, None, now);
        let (w, a) = (of(&board, "floor-5m"), of(&board, "floor-all"));
        assert_eq!((w.segments, a.segments), (60, 60));
        assert_eq!((w.state.as_str(), a.state.as_str()), ("inactive", "inactive"), "too few segments to judge by");
        drop(trackers);
    }

    #[test]
    fn the_board_remembers_spans_of_firing_bounded() {
        let board = AlertBoard::default();
        board.record("floor", "s", Transition::Fired, 100);
        board.record("other", "s", Transition::Fired, 150);
        board.record("floor", "s", Transition::Resolved, 200);
        assert_eq!(
            board.spans_of("s"),
            [AlertSpan { rule: "floor".into(), from: 100, until: Some(200) }, AlertSpan { rule: "other".into(), from: 150, until: None }]
        );
        // A resolve with nothing open changes nothing.
        board.record("floor", "s", Transition::Resolved, 300);
        assert_eq!(board.spans_of("s")[0].until, Some(200));
        for t in 0..2 * MAX_ALERT_SPANS as i64 {
            board.record("floor", "s", Transition::Fired, 1000 + 2 * t);
            board.record("floor", "s", Transition::Resolved, 1001 + 2 * t);
        }
        let spans = board.spans_of("s");
        assert_eq!(spans.len(), MAX_ALERT_SPANS);
        assert_eq!(spans.last().map(|s| s.until), Some(Some(1001 + 2 * (2 * MAX_ALERT_SPANS as i64 - 1))), "the newest kept");
        // A session no rule judges any more keeps none.
        board.publish(HashMap::new(), HashMap::new());
        assert!(board.spans_of("s").is_empty());
    }

    /// Rules on external metrics, with a generated quality-estimation stream (0-1, 4 decimals;
    /// each item's value is its own quality plus noise, sd about 0.1): after 100 stable chunks of
    /// 100 values, session `cand` falls by 0.02 for 40 chunks while `stable` does not. `below`
    /// (threshold 0.69, stable mean 0.70), `drop` against `prod` (fed the same items, by key; 0.005
    /// beyond) and `decline` (0.02) fire on `cand` during the drop and never before, and never on
    /// `stable`; the same for `errors`, declared lower-is-better (1 - the QE value), whose rules
    /// fire on a rise.
    #[test]
    fn external_rules_fire_on_a_drop_of_two_hundredths_and_not_on_a_stable_stream() {
        use crate::external::{Declaration, ExternalSpec};
        let (state, _, _) = ferry_state(10, &[]);
        let decl = Declaration::new(vec![
            ExternalSpec { decimals: 4, ..ExternalSpec::new("qe", 0.0, 1.0).unwrap() },
            ExternalSpec { decimals: 4, higher_is_better: false, ..ExternalSpec::new("errors", 0.0, 1.0).unwrap() },
        ])
        .unwrap();
        let sessions: Vec<Arc<Session>> = ["prod", "stable", "cand"]
            .iter()
            .map(|name| {
                let labels = if *name == "prod" { Default::default() } else { [("watched".to_string(), "yes".to_string())].into() };
                let mut spec = state.session_spec(name, "ferry", Default::default(), labels, 0, Default::default()).unwrap();
                spec.external = decl.clone();
                state.create_session(spec, false).unwrap().0
            })
            .collect();
        let rule = |name: &str, ext: &str, rest: &str| -> toml::Value { toml::from_str(&format!("name = \"{name}\"\nlabels = {{ watched = \"yes\" }}\nexternal = \"{ext}\"\nmin_segments = 100\n{rest}")).unwrap() };
        let rules = checked(vec![
            rule("qe-below", "qe", "when = \"below\"\nthreshold = 0.69"),
            rule("qe-drop", "qe", "when = \"drop\"\nbaseline = \"prod\"\npoints = 0.005"),
            rule("qe-decline", "qe", "when = \"decline\"\npoints = 0.02"),
            rule("errors-below", "errors", "when = \"below\"\nthreshold = 0.31"),
            rule("errors-drop", "errors", "when = \"drop\"\nbaseline = \"prod\"\npoints = 0.005"),
            rule("errors-decline", "errors", "when = \"decline\"\npoints = 0.02"),
        ]);
        let board = AlertBoard::default();
        let mut trackers = HashMap::new();
        let mut rng = SplitMix64::new(29);
        let (stable_chunks, drop_chunks) = (100u64, 40u64);
        let mut first_firing: HashMap<(String, String), u64> = HashMap::new();
        for chunk in 0..stable_chunks + drop_chunks {
            let mut batches: [Vec<(u64, crate::external::ItemValues)>; 3] = Default::default();
            for i in 0..100u64 {
                let key = chunk * 100 + i;
                let quality = 0.55 + 0.3 * rng.next_f64();
                for (s, batch) in batches.iter_mut().enumerate() {
                    let fall = if s == 2 && chunk >= stable_chunks { 0.02 } else { 0.0 };
                    let v: f64 = (quality + 0.1 * (rng.next_f64() - 0.5) - fall).clamp(0.0, 1.0);
                    batch.push((key, decl.check_item([("qe", v), ("errors", 1.0 - v)]).unwrap()));
                }
            }
            for (session, batch) in sessions.iter().zip(&batches) {
                session.apply_external(&session.external_delta(batch).unwrap()).unwrap();
            }
            trackers = evaluate(&state, &rules, trackers, &board, None, chunk as i64);
            for name in ["stable", "cand"] {
                for a in board.of(name).into_iter().filter(|a| a.state == "firing") {
                    first_firing.entry((name.to_string(), a.rule.clone())).or_insert(chunk);
                }
            }
        }
        for r in &rules {
            assert_eq!(first_firing.get(&("stable".to_string(), r.name.clone())), None, "{}: fired on the stable session", r.name);
            let at = first_firing.get(&("cand".to_string(), r.name.clone())).copied();
            assert!(at.is_some_and(|c| c >= stable_chunks), "{}: fires on the drop, not before: {at:?} (drop at chunk {stable_chunks})", r.name);
        }
        // What the board shows for a rule on an external metric: the mean in its own units.
        let shown = board.of("cand").into_iter().find(|a| a.rule == "qe-below").unwrap();
        assert!(shown.value.is_some_and(|v| (0.6..0.75).contains(&v)), "{shown:?}");
        assert!(shown.condition.contains("mean qe"), "{}", shown.condition);
    }
}
