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
use crate::alerts::rules::{Condition, Measured, Rule, State as AlertState, Tracker, Transition};
use crate::metric::compare::CompareSettings;
use crate::metric::resample::DEFAULT_LEVEL;
use crate::metric::scores::corpus_score;
use crate::pb;
use crate::session::Session;
use crate::telemetry;

/// The states of every (rule, session) pair as last evaluated, by session name: what reports
/// show. Written only by the evaluator.
#[derive(Clone, Default)]
pub struct AlertBoard {
    inner: Arc<Mutex<HashMap<String, Vec<pb::AlertStatus>>>>,
}

impl AlertBoard {
    /// The alerts of a session, by rule name.
    pub fn of(&self, session: &str) -> Vec<pb::AlertStatus> {
        self.inner.lock().unwrap_or_else(|e| e.into_inner()).get(session).cloned().unwrap_or_default()
    }

    fn publish(&self, all: HashMap<String, Vec<pb::AlertStatus>>) {
        *self.inner.lock().unwrap_or_else(|e| e.into_inner()) = all;
    }
}

/// Start evaluating `rules` every `every` until `stop` turns true (inside a Tokio runtime).
pub fn start(state: State, rules: Vec<Rule>, every: Duration, board: AlertBoard, mut stop: watch::Receiver<bool>) {
    if rules.is_empty() {
        return;
    }
    let rules = Arc::new(rules);
    tokio::spawn(async move {
        let mut trackers: HashMap<(String, String), Tracker> = HashMap::new();
        let mut tick = tokio::time::interval(every.max(Duration::from_secs(1)));
        tick.set_missed_tick_behavior(tokio::time::MissedTickBehavior::Skip);
        loop {
            tokio::select! {
                _ = stop.wait_for(|s| *s) => break,
                _ = tick.tick() => {}
            }
            let (st, r, b) = (state.clone(), Arc::clone(&rules), board.clone());
            let owned = std::mem::take(&mut trackers);
            match tokio::task::spawn_blocking(move || evaluate(&st, &r, owned, &b, unix_now())).await {
                Ok(t) => trackers = t,
                Err(e) => tracing::error!(error = %e, "alert evaluation failed"),
            }
        }
    });
}

/// One round over every rule and every session it selects; returns the trackers (pairs whose
/// session went away are dropped).
pub fn evaluate(state: &State, rules: &[Rule], mut trackers: HashMap<(String, String), Tracker>, board: &AlertBoard, now: i64) -> HashMap<(String, String), Tracker> {
    let mut next = HashMap::new();
    let mut views: HashMap<String, Vec<pb::AlertStatus>> = HashMap::new();
    for session in state.sessions() {
        let spec = session.spec();
        for rule in rules.iter().filter(|r| r.selects(&spec.name, &spec.labels)) {
            let key = (rule.name.clone(), spec.name.clone());
            let mut t = trackers.remove(&key).unwrap_or_else(|| Tracker::new(now));
            let m = measure(state, rule, &session);
            if let Some(change) = t.step(rule, m, now) {
                log_transition(rule, &spec.name, change, m);
            }
            telemetry::record_alert(&rule.name, &spec.name, t.state.name(), &AlertState::ALL.map(AlertState::name));
            views.entry(spec.name.clone()).or_default().push(view(rule, &t));
            next.insert(key, t);
        }
    }
    // Pairs that are gone (session closed) stop firing in the gauges.
    for ((rule, session), _) in trackers {
        telemetry::record_alert(&rule, &session, AlertState::Inactive.name(), &AlertState::ALL.map(AlertState::name));
    }
    board.publish(views);
    next
}

/// What the rule judges by, now (None: nothing to judge by).
fn measure(state: &State, rule: &Rule, session: &Session) -> Option<Measured> {
    let config = &session.spec().config;
    if !config.has(rule.metric) {
        return None;
    }
    match &rule.condition {
        Condition::Below { .. } => {
            let stats = session.state().window.stats();
            let (_, recent) = session.replicates();
            let i = recent?.interval(rule.metric, DEFAULT_LEVEL)?;
            Some(Measured { value: corpus_score(&stats, config, rule.metric)?, low: i.low, high: i.high, segments: stats.segments })
        }
        Condition::Drop { baseline, .. } => {
            let base = state.session(baseline).ok()?;
            let r = session.spec().resampling;
            let settings = CompareSettings { resamples: r.resamples, seed: r.seed, level: DEFAULT_LEVEL, trials: 0 };
            let p = super::compare::paired(session, &base, &settings, 1).ok()?;
            let m = p.comparison.get(rule.metric)?;
            let i = m.interval?;
            Some(Measured { value: m.difference, low: i.low, high: i.high, segments: p.comparison.segments })
        }
    }
}

/// The condition in words.
pub fn describe(rule: &Rule) -> String {
    match &rule.condition {
        Condition::Below { threshold } => format!("recent {} 95% interval entirely below {threshold}", rule.metric.name()),
        Condition::Drop { baseline, points } => format!("recent {} at least {points} points below session {baseline} (paired 95% interval of the difference below -{points})", rule.metric.name()),
    }
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
    }
}

fn log_transition(rule: &Rule, session: &str, change: Transition, m: Option<Measured>) {
    let (value, high) = (m.map(|m| m.value), m.map(|m| m.high));
    match change {
        Transition::Fired => tracing::warn!(alert = %rule.name, session, severity = %rule.severity, condition = %describe(rule), ?value, ?high, "alert firing"),
        Transition::Resolved => tracing::info!(alert = %rule.name, session, condition = %describe(rule), ?value, ?high, "alert resolved"),
    }
}
