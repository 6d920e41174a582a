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

/// Seconds between two posts of a firing alert to the targets: Alertmanager ends an alert it
/// has not heard of for its resolve timeout (5 minutes by default), so a firing alert is sent
/// again well within it (common practice: once a minute).
pub const RESEND_SECONDS: i64 = 60;

/// A (rule, session) pair as the evaluator keeps it.
#[derive(Debug, Clone, Copy)]
pub struct Pair {
    tracker: Tracker,
    /// When the alert last fired (its startsAt) and when it was last posted.
    fired_at: i64,
    posted_at: i64,
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
    for session in state.sessions() {
        let spec = session.spec();
        for rule in rules.iter().filter(|r| r.selects(&spec.name, &spec.labels)) {
            let key = (rule.name.clone(), spec.name.clone());
            let mut p = trackers.remove(&key).unwrap_or(Pair { tracker: Tracker::new(now), fired_at: now, posted_at: now });
            let m = measure(state, rule, &session);
            let change = p.tracker.step(rule, m, now);
            if let Some(change) = change {
                log_transition(rule, &spec.name, change, m);
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
    board.publish(views);
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
    l.insert("metric".into(), rule.metric.name().to_owned());
    l
}

/// The alert as posted: firing (with its latest measurement) or resolved at `now`.
fn event(rule: &Rule, session: &Session, p: &Pair, resolved: bool, now: i64) -> AlertEvent {
    let mut annotations = rule.annotations.clone();
    let measured = p.tracker.last.map_or_else(|| "nothing to judge by".to_owned(), |m| format!("{:.2} (95% interval {:.2} .. {:.2}, {} segments)", m.value, m.low, m.high, m.segments));
    annotations.entry("summary".into()).or_insert_with(|| format!("{}: {} on session {}", rule.name, describe(rule), session.spec().name));
    annotations.insert("measured".into(), measured);
    annotations.insert(
        "description".into(),
        format!("{} is an automatic proxy for translation quality: look at the session's recent output and at what changed (model, input, references) before concluding anything.", rule.metric.title()),
    );
    AlertEvent { labels: labels(rule, &session.spec().name), annotations, starts_at: at(p.fired_at), ends_at: resolved.then(|| at(now)), generator_url: String::new() }
}

/// A firing alert whose session was closed: resolved at `now`.
fn closed_event(rule: &Rule, session: &str, p: &Pair, now: i64) -> AlertEvent {
    let annotations = [("summary".to_owned(), format!("{}: session {session} was closed", rule.name))].into();
    AlertEvent { labels: labels(rule, session), annotations, starts_at: at(p.fired_at), ends_at: Some(at(now)), generator_url: String::new() }
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
