//! Alert rules as the config file declares them (`[[alert]]` entries of `serve --config`), checked
//! once at startup, and the state machine each (rule, session) pair goes through.
//!
//! Pure and synchronous: the server's evaluator feeds it what it measured.
//!
//! # Conditions
//! - `below`: the score's whole confidence interval lies below `threshold` (its upper bound is
//!   under it). A score that dips below the threshold by chance, with an interval that still
//!   reaches above it, does not fire.
//! - `decline`: against the session's own past: a sequential test (the CUSUM of
//!   [`super::shift`]) over chunks of at least `min_segments` new segments flags a drop of
//!   `points` beyond each chunk's bootstrap standard error; it resolves once the test is back
//!   at 0.
//! - `drop`: against a `baseline` session on the same reference set, the upper bound of the
//!   paired-bootstrap interval of (session - baseline), over the segments both `recent` windows
//!   hold, lies below `-points`: the session is worse by at least `points` beyond resampling
//!   noise.
//! - `flag-rate`: the share of the items a reference-free `guard` decided on that it flagged,
//!   since the session was created or reset: the lower bound of its 95% Wilson score interval
//!   (Wilson 1927) lies above `threshold` (a percentage). A rate above the threshold by chance,
//!   on a handful of items, does not fire; `min_segments` counts the guard's decided items.
//!   Daemon only (`window` is `all`, the counts the daemon keeps).
//!
//! # Windows
//! What `below` and `drop` judge: `recent` (the default of `below`), the session's recent window
//! of the last segments; the last N segments each session scored, such as `1800seg` (the
//! default of `drop`: [`DEFAULT_DROP_WINDOW_SEGMENTS`]); `all`, everything since the session was
//! created or reset; or a time window such as `15m` or `1h` (an integer and s, m, h or d), the
//! segments scored in the last that long. The daemon evaluates all four; `mtgauge rules`
//! renders `all` and time windows for Prometheus (`recent` and `Nseg` count segments, which
//! Prometheus cannot: daemon only). `decline` tests chunks of new segments and takes no window.
//!
//! # States (the Prometheus vocabulary)
//! inactive -> pending when the condition holds (with at least `min_segments` behind it);
//! pending -> firing once it has held for `for_seconds` and through `for_segments` newly scored
//! segments (default: 400 segments for `below`, 200 for `drop`, nothing more for `decline` or `flag-rate`; a rule
//! that sets only `for_seconds` waits for time alone); pending -> inactive as soon as it does
//! not. A firing alert resolves (-> inactive) only once its bound has come back past the
//! threshold by `clear_margin` points (hysteresis), or when there are fewer than
//! `min_segments` segments to judge by.

use std::collections::BTreeMap;

use serde::{Deserialize, Serialize};

use crate::metric::Metric;

/// Segments a rule needs behind its interval unless it sets `min_segments` (common practice:
/// a corpus score over fewer segments moves by points by chance alone).
pub const DEFAULT_MIN_SEGMENTS: u64 = 200;
/// Seconds a condition must hold before its alert fires, unless the rule sets `for_seconds`
/// (see [`DEFAULT_FOR_SEGMENTS`]).
pub const DEFAULT_FOR_SECONDS: u64 = 0;
/// Segments scored while a `below` or `drop` condition holds before its alert fires, unless the
/// rule sets `for_segments` or `for_seconds` (a rule that sets only `for_seconds` waits for
/// time alone). Counted in segments, the delay a rule adds does not grow with traffic, and it
/// is what the detection benchmark measures (`mtgauge alert-bench`). `decline` rules wait for
/// nothing more by default: their sequential test is itself the accumulation of evidence; nor do
/// `flag-rate` rules, whose Wilson bound already weighs how many items were checked.
pub const DEFAULT_FOR_SEGMENTS: u64 = 400;
/// Points past the threshold a firing alert's bound must come back by to resolve, unless the
/// rule sets `clear_margin`.
pub const DEFAULT_CLEAR_MARGIN: f64 = 0.5;
/// Hysteresis of rules on an external metric unless set, in the metric's own units (whose
/// scale mtgauge does not know: none unless the rule sets `clear_margin`).
pub const DEFAULT_EXTERNAL_CLEAR_MARGIN: f64 = 0.0;
/// Severity label unless the rule sets one.
pub const DEFAULT_SEVERITY: &str = "warning";
/// Seconds between two evaluations of every rule unless configured (`alert_eval_seconds`).
pub const DEFAULT_EVAL_SECONDS: u64 = 5;
/// Shortest time window a rule may use, in seconds.
pub const MIN_WINDOW_SECONDS: u64 = 60;
/// Longest time window a rule may use, in seconds (7 days).
pub const MAX_WINDOW_SECONDS: u64 = 7 * 86_400;
/// Shortest segment-count window a rule may use (`100seg`).
pub const MIN_WINDOW_SEGMENTS: u64 = 100;
/// Longest segment-count window a rule may use.
pub const MAX_WINDOW_SEGMENTS: u64 = 1_000_000;
/// The window of `drop` rules unless they set one: the last 1,800 segments of each session.
/// Longer than the default recent window (1,000): the paired difference carries the noise of
/// both sessions, and its interval over 1,800 segments is 0.75 times as wide, which lets a rule
/// set for a 1-point drop stay silent over 10 million stable segments and still find 2- and
/// 5-point drops in time (`mtgauge alert-bench`; 2,000 segments found a 5-point drop too late,
/// the recent window raised a false alert).
pub const DEFAULT_DROP_WINDOW_SEGMENTS: u64 = 1_800;
/// Segments a `drop` rule's condition must hold through unless it sets `for_segments`: with its
/// longer window it needs less confirmation than `below` (100 and 150 let a false alert through
/// in the benchmark).
pub const DEFAULT_DROP_FOR_SEGMENTS: u64 = 200;
/// Most rules a config file may declare.
pub const MAX_RULES: usize = 256;
/// Labels every alert carries, set by mtgauge (not by `extra_labels`).
pub const ALERT_LABELS: [&str; 4] = ["alertname", "session", "severity", "metric"];
/// Keys of one `[[alert]]` entry.
pub const RULE_KEYS: [&str; 18] = [
    "name", "session", "labels", "metric", "window", "when", "threshold", "baseline", "points", "min_segments", "for_seconds", "for_segments", "clear_margin", "severity",
    "extra_labels", "annotations", "guard", "external",
];
/// Standard normal quantile of the two-sided 95% intervals of `flag-rate` rules.
pub const WILSON_Z95: f64 = 1.959_963_984_540_054;

/// The Wilson (1927) score interval of a binomial proportion with `successes` of `n` trials
/// and normal quantile `z`: (low, high), both in 0..=1; None when `n` is 0.
pub fn wilson(successes: u64, n: u64, z: f64) -> Option<(f64, f64)> {
    if n == 0 {
        return None;
    }
    let (nf, p) = (n as f64, successes.min(n) as f64 / n as f64);
    let z2 = z * z;
    let denom = 1.0 + z2 / nf;
    let center = (p + z2 / (2.0 * nf)) / denom;
    let half = z / denom * (p * (1.0 - p) / nf + z2 / (4.0 * nf * nf)).sqrt();
    Some(((center - half).max(0.0), (center + half).min(1.0)))
}

/// One `[[alert]]` entry as written.
#[derive(Debug, Clone, Default, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct RuleEntry {
    name: String,
    session: Option<String>,
    #[serde(default)]
    labels: BTreeMap<String, String>,
    metric: Option<String>,
    window: Option<String>,
    when: Option<String>,
    threshold: Option<f64>,
    baseline: Option<String>,
    points: Option<f64>,
    min_segments: Option<u64>,
    for_seconds: Option<u64>,
    for_segments: Option<u64>,
    clear_margin: Option<f64>,
    severity: Option<String>,
    #[serde(default)]
    annotations: BTreeMap<String, String>,
    /// Extra labels of the alert (`[alert.extra_labels]`).
    #[serde(default)]
    extra_labels: BTreeMap<String, String>,
    /// `flag-rate` rules: the guard whose rate is judged.
    guard: Option<String>,
    /// Rules on a session's external metric (instead of `metric`): its declared name.
    external: Option<String>,
}

/// The segments a `below` or `drop` rule judges.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Window {
    /// The session's recent window (its last segments).
    Recent,
    /// Everything since the session was created or reset.
    All,
    /// The segments scored in the last this many seconds.
    Last(u64),
    /// The last this many segments each session scored (to within 1/30 of it).
    Segments(u64),
}

impl Window {
    /// Parse `recent`, `all` or a duration (`90s`, `15m`, `1h`, `2d`).
    pub fn parse(text: &str) -> Result<Window, String> {
        match text {
            "recent" => return Ok(Window::Recent),
            "all" => return Ok(Window::All),
            _ => {}
        }
        let bad = || format!("window '{text}' is not recent, all, a duration such as 15m or 1h (an integer and s, m, h or d), or a count of segments such as 2000seg");
        if let Some(n) = text.strip_suffix("seg") {
            let n: u64 = n.parse().map_err(|_| bad())?;
            if !(MIN_WINDOW_SEGMENTS..=MAX_WINDOW_SEGMENTS).contains(&n) {
                return Err(format!("window '{text}' is not between {MIN_WINDOW_SEGMENTS} and {MAX_WINDOW_SEGMENTS} segments"));
            }
            return Ok(Window::Segments(n));
        }
        let split = text.find(|c: char| !c.is_ascii_digit()).ok_or_else(bad)?;
        let (digits, unit) = text.split_at(split);
        let n: u64 = digits.parse().map_err(|_| bad())?;
        let scale = match unit {
            "s" => 1,
            "m" => 60,
            "h" => 3_600,
            "d" => 86_400,
            _ => return Err(bad()),
        };
        let seconds = n.checked_mul(scale).ok_or_else(bad)?;
        if !(MIN_WINDOW_SECONDS..=MAX_WINDOW_SECONDS).contains(&seconds) {
            return Err(format!("window '{text}' is not between {MIN_WINDOW_SECONDS} s and {} days", MAX_WINDOW_SECONDS / 86_400));
        }
        Ok(Window::Last(seconds))
    }

    /// The name in outputs: `recent`, `all`, or the duration in its largest whole unit (`15m`);
    /// also a valid Prometheus range.
    pub fn name(self) -> String {
        match self {
            Window::Recent => "recent".into(),
            Window::All => "all".into(),
            Window::Segments(n) => format!("{n}seg"),
            Window::Last(s) => {
                let (n, u) = [(86_400, "d"), (3_600, "h"), (60, "m")].into_iter().find(|(n, _)| s % n == 0).unwrap_or((1, "s"));
                format!("{}{u}", s / n)
            }
        }
    }

    /// Words for descriptions: "recent", "since start", "last 15m".
    pub fn describe(self) -> String {
        match self {
            Window::Recent => "recent".into(),
            Window::All => "since start".into(),
            Window::Last(_) => format!("last {}", self.name()),
            Window::Segments(n) => format!("last {n} segments"),
        }
    }
}

impl Serialize for Window {
    fn serialize<S: serde::Serializer>(&self, s: S) -> Result<S::Ok, S::Error> {
        s.serialize_str(&self.name())
    }
}

/// What a rule tests.
#[derive(Debug, Clone, PartialEq, Serialize)]
#[serde(tag = "when", rename_all = "lowercase")]
pub enum Condition {
    /// The interval's upper bound below `threshold`.
    Below {
        /// Score, 0-100.
        threshold: f64,
    },
    /// A drop of `points` against the session's own past chunks (CUSUM).
    Decline {
        /// Points of drop to detect.
        points: f64,
    },
    /// The paired interval of (session - baseline) entirely below `-points`.
    Drop {
        /// The baseline session's name.
        baseline: String,
        /// Points of drop, at least.
        points: f64,
    },
    /// The Wilson interval of a guard's flag rate entirely above `threshold` percent.
    #[serde(rename = "flag-rate")]
    FlagRate {
        /// The guard's name (one of [`crate::guard::Guard::ALL`]).
        guard: String,
        /// Rate, in percent.
        threshold: f64,
    },
}

/// A checked rule.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct Rule {
    /// Rule name (a Prometheus label value).
    pub name: String,
    /// Sessions it watches: by name, and/or by labels (all must match).
    pub session: Option<String>,
    /// Label selector.
    pub labels: BTreeMap<String, String>,
    /// The metric.
    #[serde(serialize_with = "metric_name")]
    pub metric: Metric,
    /// A session's external metric it judges instead of `metric` (its declared name): the
    /// mean of its values, in the metric's own units; `below` and `drop` mean worse than, which
    /// is above for a metric declared lower-is-better.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub external: Option<String>,
    /// The segments `below` and `drop` judge (`recent` for `decline`, which takes none).
    pub window: Window,
    /// What fires it.
    pub condition: Condition,
    /// Segments needed behind the interval.
    pub min_segments: u64,
    /// Seconds the condition must hold.
    pub for_seconds: u64,
    /// Segments scored while the condition holds, before it fires.
    pub for_segments: u64,
    /// Hysteresis, in score points.
    pub clear_margin: f64,
    /// Severity label.
    pub severity: String,
    /// Extra labels of the alert.
    pub extra_labels: BTreeMap<String, String>,
    /// Annotations of the alert.
    pub annotations: BTreeMap<String, String>,
}

fn metric_name<S: serde::Serializer>(m: &Metric, s: S) -> Result<S::Ok, S::Error> {
    s.serialize_str(m.name())
}

/// Why a rule is not acceptable (names the rule and the key).
#[derive(Debug, Clone, PartialEq, Eq, thiserror::Error)]
#[error("alert rule '{rule}': {message}")]
pub struct RuleError {
    /// The rule's name (or its position when unnamed).
    pub rule: String,
    /// What is wrong.
    pub message: String,
}

impl RuleEntry {
    /// Check the entry and fill in the defaults.
    pub fn check(&self, position: usize) -> Result<Rule, RuleError> {
        let rule = if self.name.is_empty() { format!("#{}", position + 1) } else { self.name.clone() };
        let err = |m: String| RuleError { rule: rule.clone(), message: m };
        crate::session::check_name("rule name", &self.name).map_err(|e| err(e.to_string()))?;
        if self.session.is_none() && self.labels.is_empty() {
            return Err(err("give `session` (a name) or `labels` (a selector), or both".into()));
        }
        if let Some(name) = &self.external {
            if !crate::external::valid_name(name) {
                return Err(err(format!("external '{}' is not a valid metric name ([a-zA-Z_][a-zA-Z0-9_]*)", name.escape_debug())));
            }
            if self.metric.is_some() {
                return Err(err("give `metric` (a built-in metric) or `external` (a session's own metric), not both".into()));
            }
            if self.when.as_deref() == Some("flag-rate") {
                return Err(err("`external` does not belong to `when = \"flag-rate\"`".into()));
            }
        }
        let external = self.external.is_some();
        let m = self.metric.as_deref().unwrap_or("bleu");
        let metric = Metric::ALL.into_iter().find(|x| x.name() == m).ok_or_else(|| err(format!("metric '{m}' is not one of bleu, chrf, chrf++")))?;
        let window = match (self.window.as_deref(), self.when.as_deref()) {
            (Some(w), _) => Window::parse(w).map_err(err)?,
            (None, Some("flag-rate")) => Window::All,
            (None, Some("drop")) => Window::Segments(DEFAULT_DROP_WINDOW_SEGMENTS),
            (None, _) => Window::Recent,
        };
        if self.guard.is_some() && self.when.as_deref() != Some("flag-rate") {
            return Err(err("`guard` belongs to `when = \"flag-rate\"`".into()));
        }
        let condition = match self.when.as_deref() {
            Some("flag-rate") => {
                let guard = self.guard.clone().ok_or_else(|| err("`when = \"flag-rate\"` needs `guard` (empty, copy, length, repetition, script or language)".into()))?;
                if !crate::guard::Guard::ALL.iter().any(|g| g.name() == guard) {
                    return Err(err(format!("guard '{guard}' is not one of empty, copy, length, repetition, script, language")));
                }
                let threshold = self.threshold.ok_or_else(|| err("`when = \"flag-rate\"` needs `threshold` (a rate in percent)".into()))?;
                if !(0.0..100.0).contains(&threshold) {
                    return Err(err(format!("threshold {threshold} is not a rate in percent from 0 to under 100")));
                }
                if self.baseline.is_some() || self.points.is_some() || self.metric.is_some() {
                    return Err(err("`baseline`, `points` and `metric` do not belong to `when = \"flag-rate\"`".into()));
                }
                if window != Window::All {
                    return Err(err("a `flag-rate` rule judges the guard's counts since start: `window` can only be `all`".into()));
                }
                Condition::FlagRate { guard, threshold }
            }
            Some("below") => {
                let threshold = self.threshold.ok_or_else(|| err("`when = \"below\"` needs `threshold`".into()))?;
                if external && !threshold.is_finite() {
                    return Err(err(format!("threshold {threshold} is not a number")));
                }
                if !external && !(0.0..=100.0).contains(&threshold) {
                    return Err(err(format!("threshold {threshold} is not a score between 0 and 100")));
                }
                if self.baseline.is_some() || self.points.is_some() {
                    return Err(err("`baseline` and `points` belong to `when = \"drop\"`".into()));
                }
                Condition::Below { threshold }
            }
            Some("drop") => {
                let baseline = self.baseline.clone().ok_or_else(|| err("`when = \"drop\"` needs `baseline` (a session name)".into()))?;
                let points = self.points.ok_or_else(|| err("`when = \"drop\"` needs `points`".into()))?;
                if !(0.0..=100.0).contains(&points) && !(external && points.is_finite() && points >= 0.0) {
                    return Err(err(format!("points {points} is not between 0 and 100")));
                }
                if self.threshold.is_some() {
                    return Err(err("`threshold` belongs to `when = \"below\"`".into()));
                }
                Condition::Drop { baseline, points }
            }
            Some("decline") => {
                let points = self.points.ok_or_else(|| err("`when = \"decline\"` needs `points` (the drop to detect)".into()))?;
                if !(points > 0.0 && (points <= 100.0 || external && points.is_finite())) {
                    return Err(err(format!("points {points} is not above 0 and at most 100")));
                }
                if self.threshold.is_some() || self.baseline.is_some() {
                    return Err(err("`threshold` and `baseline` do not belong to `when = \"decline\"`".into()));
                }
                if self.window.is_some() {
                    return Err(err("`window` does not belong to `when = \"decline\"`: it tests chunks of new segments (min_segments each)".into()));
                }
                Condition::Decline { points }
            }
            Some(w) => return Err(err(format!("when '{w}' is not one of below, drop, decline, flag-rate"))),
            None => return Err(err("`when` is missing: below, drop, decline or flag-rate".into())),
        };
        crate::session::check_labels(&self.labels).map_err(|e| err(format!("labels: {e}")))?;
        for (what, map) in [("extra_labels", &self.extra_labels), ("annotations", &self.annotations)] {
            for k in map.keys() {
                let valid = !k.is_empty() && !k.starts_with("__") && k.bytes().enumerate().all(|(i, b)| b == b'_' || b.is_ascii_alphabetic() || (i > 0 && b.is_ascii_digit()));
                if !valid || (what == "extra_labels" && ALERT_LABELS.contains(&k.as_str())) {
                    return Err(err(format!("{what}: '{}' is not a valid name: use [a-zA-Z_][a-zA-Z0-9_]*, not starting with '__'{}", k.escape_debug(), if what == "extra_labels" { ", and none of alertname, session, severity, metric" } else { "" })));
                }
            }
        }
        let clear_margin = self.clear_margin.unwrap_or(if external { DEFAULT_EXTERNAL_CLEAR_MARGIN } else { DEFAULT_CLEAR_MARGIN });
        if clear_margin.is_nan() || clear_margin < 0.0 {
            return Err(err(format!("clear_margin {clear_margin} is negative")));
        }
        let for_segments = match (self.for_segments, self.for_seconds, &condition) {
            (Some(n), _, _) => n,
            (None, Some(_), _) | (None, None, Condition::Decline { .. } | Condition::FlagRate { .. }) => 0,
            (None, None, Condition::Drop { .. }) => DEFAULT_DROP_FOR_SEGMENTS,
            (None, None, _) => DEFAULT_FOR_SEGMENTS,
        };
        Ok(Rule {
            name: self.name.clone(),
            session: self.session.clone(),
            labels: self.labels.clone(),
            metric,
            external: self.external.clone(),
            window,
            condition,
            min_segments: self.min_segments.unwrap_or(DEFAULT_MIN_SEGMENTS),
            for_seconds: self.for_seconds.unwrap_or(DEFAULT_FOR_SECONDS),
            for_segments,
            clear_margin,
            severity: self.severity.clone().unwrap_or_else(|| DEFAULT_SEVERITY.to_owned()),
            extra_labels: self.extra_labels.clone(),
            annotations: self.annotations.clone(),
        })
    }
}

/// Check every entry; names must be unique.
pub fn check_rules(entries: &[RuleEntry]) -> Result<Vec<Rule>, RuleError> {
    if entries.len() > MAX_RULES {
        return Err(RuleError { rule: format!("#{}", entries.len()), message: format!("more than {MAX_RULES} rules") });
    }
    let rules = entries.iter().enumerate().map(|(i, e)| e.check(i)).collect::<Result<Vec<_>, _>>()?;
    let mut seen = std::collections::HashSet::new();
    for r in &rules {
        if !seen.insert(&r.name) {
            return Err(RuleError { rule: r.name.clone(), message: "declared twice".into() });
        }
    }
    Ok(rules)
}

impl Rule {
    /// The condition in words (reports, logs, rendered rules).
    pub fn describe(&self) -> String {
        let what = self.subject();
        let units = if self.external.is_some() { "" } else { " points" };
        match &self.condition {
            Condition::Below { threshold } if self.external.is_some() => format!("{} mean {what}: 95% interval entirely worse than {threshold} (below it, or above it for a lower-is-better metric)", self.window.describe()),
            Condition::Below { threshold } => format!("{} {what} 95% interval entirely below {threshold}", self.window.describe()),
            Condition::Drop { baseline, points } if self.external.is_some() => {
                format!("{} mean {what} at least {points} worse than session {baseline} (95% interval of the difference beyond {points}: below -{points}, or above it for a lower-is-better metric)", self.window.describe())
            }
            Condition::Drop { baseline, points } => {
                format!("{} {what} at least {points} points below session {baseline} (paired 95% interval of the difference below -{points})", self.window.describe())
            }
            Condition::Decline { points } => format!("{what} of chunks of {} segments {points}{units} worse than the session's own past (CUSUM past its decision limit)", self.min_segments),
            Condition::FlagRate { guard, threshold } => format!("share of items the {guard} guard flags since start: 95% Wilson interval entirely above {threshold}%"),
        }
    }

    /// The `description` annotation of its alerts (the daemon's and the rendered rules'): what
    /// the measure is a proxy for, and where to look.
    pub fn description(&self) -> String {
        match &self.condition {
            Condition::FlagRate { guard, .. } => format!(
                "The {guard} guard flags likely broken output by a fixed rule, without a reference: look at the session's flagged items (per-item verdicts) and at what changed (model, input) before concluding anything."
            ),
            _ => format!(
                "{} is an automatic proxy for translation quality: look at the session's recent output and at what changed (model, input, references) before concluding anything.",
                self.external.as_deref().unwrap_or(self.metric.title())
            ),
        }
    }

    /// What the rule judges: the built-in metric's name, or the external metric's.
    pub fn subject(&self) -> &str {
        self.external.as_deref().unwrap_or(self.metric.name())
    }

    /// The `metric` label of its alerts (the daemon's and the rendered rules', so that
    /// Alertmanager sees one alert from both): what it judges, or for `flag-rate` the guard
    /// (`guard:copy`).
    pub fn metric_label(&self) -> String {
        match &self.condition {
            Condition::FlagRate { guard, .. } => format!("guard:{guard}"),
            _ => self.subject().to_owned(),
        }
    }

    /// Whether the rule watches a session with this name and these labels.
    pub fn selects(&self, name: &str, labels: &BTreeMap<String, String>) -> bool {
        self.session.as_deref().is_none_or(|s| s == name) && self.labels.iter().all(|(k, v)| labels.get(k) == Some(v))
    }

    /// Whether a measurement meets the condition (`fires`), and whether it is past the
    /// clearing point (`clears`): the upper bound against the limit with `clear_margin`, or for
    /// `decline` the test statistic against its decision limit (clear at 0).
    fn judge(&self, m: &Measured) -> (bool, bool) {
        let limit = match &self.condition {
            Condition::Below { threshold } => *threshold,
            Condition::Drop { points, .. } if m.higher_is_worse => *points,
            Condition::Drop { points, .. } => -points,
            Condition::Decline { .. } => {
                let s = m.statistic.unwrap_or(0.0);
                return (s > 1.0, s == 0.0);
            }
            // Above, not below: the lower bound against the threshold.
            Condition::FlagRate { threshold, .. } => return (m.low > *threshold, m.low <= threshold - self.clear_margin),
        };
        if m.higher_is_worse {
            // Worse is higher: the lower bound against the limit.
            return (m.low > limit, m.low <= limit - self.clear_margin);
        }
        (m.high < limit, m.high >= limit + self.clear_margin)
    }
}

/// State of one (rule, session) pair.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize)]
#[serde(rename_all = "lowercase")]
pub enum State {
    /// Condition not met.
    Inactive,
    /// Condition met, not yet for long enough.
    Pending,
    /// Firing.
    Firing,
}

impl State {
    /// Every state, in order.
    pub const ALL: [State; 3] = [State::Inactive, State::Pending, State::Firing];

    /// The name in outputs.
    pub fn name(self) -> &'static str {
        match self {
            State::Inactive => "inactive",
            State::Pending => "pending",
            State::Firing => "firing",
        }
    }
}

/// What one evaluation measured for a (rule, session) pair.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Measured {
    /// The score (or difference) and its interval's bounds.
    pub value: f64,
    /// Lower bound.
    pub low: f64,
    /// Upper bound.
    pub high: f64,
    /// Segments behind it.
    pub segments: u64,
    /// `decline` rules: the test statistic as a share of its decision limit (past 1: fires).
    pub statistic: Option<f64>,
    /// An external metric declared lower-is-better: `below` and `drop` fire on the lower
    /// bound above the limit (worse is higher).
    pub higher_is_worse: bool,
}

/// The running state of a (rule, session) pair.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Tracker {
    /// Current state.
    pub state: State,
    /// When the current state began (seconds since the epoch).
    pub since: i64,
    /// The last measurement (None: nothing to judge by, e.g. no interval yet).
    pub last: Option<Measured>,
    /// The session's scored segments when the current state began.
    pub since_scored: u64,
}

/// A change of state worth telling (firing or resolved).
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Transition {
    /// Started firing.
    Fired,
    /// Stopped firing.
    Resolved,
}

impl Tracker {
    /// A new pair, inactive since `now`.
    pub fn new(now: i64) -> Tracker {
        Tracker { state: State::Inactive, since: now, last: None, since_scored: 0 }
    }

    /// Advance with one evaluation at `now`, when the session has scored `scored` segments
    /// (`m`: None when there is no interval to judge by). Pending becomes firing once the
    /// condition has held for `for_seconds` and through `for_segments` newly scored segments.
    pub fn step(&mut self, rule: &Rule, m: Option<Measured>, now: i64, scored: u64) -> Option<Transition> {
        self.last = m;
        let judged = m.filter(|m| m.segments >= rule.min_segments).map(|m| rule.judge(&m));
        let held = |since: i64, since_scored: u64| now - since >= rule.for_seconds as i64 && scored.saturating_sub(since_scored) >= rule.for_segments;
        let (next, t) = match (self.state, judged) {
            (State::Firing, Some((_, false))) => (State::Firing, None),
            (State::Firing, _) => (State::Inactive, Some(Transition::Resolved)),
            (State::Pending, Some((true, _))) if held(self.since, self.since_scored) => (State::Firing, Some(Transition::Fired)),
            (State::Pending, Some((true, _))) => (State::Pending, None),
            (State::Inactive, Some((true, _))) if rule.for_seconds == 0 && rule.for_segments == 0 => (State::Firing, Some(Transition::Fired)),
            (State::Inactive, Some((true, _))) => (State::Pending, None),
            (_, _) => (State::Inactive, None),
        };
        if next != self.state {
            self.state = next;
            self.since = now;
            self.since_scored = scored;
        }
        t
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn entry(toml_text: &str) -> RuleEntry {
        toml::from_str(toml_text).unwrap()
    }

    fn below(threshold: f64, for_seconds: u64) -> Rule {
        entry(&format!("name = \"floor\"\nsession = \"ferry-en-de.model-v8-rc\"\nwhen = \"below\"\nthreshold = {threshold}\nfor_seconds = {for_seconds}\nmin_segments = 100\nclear_margin = 1.0")).check(0).unwrap()
    }

    fn m(high: f64, segments: u64) -> Option<Measured> {
        Some(Measured { value: high - 2.0, low: high - 4.0, high, segments, statistic: None, higher_is_worse: false })
    }

    #[test]
    fn entries_are_checked_with_messages_naming_the_rule_and_key() {
        let r = below(45.0, 30);
        assert_eq!((r.metric, r.condition.clone(), r.severity.as_str()), (Metric::Bleu, Condition::Below { threshold: 45.0 }, DEFAULT_SEVERITY));
        let d = entry("name = \"vs-prod\"\nlabels = { model = \"v8-rc\" }\nmetric = \"chrf\"\nwhen = \"drop\"\nbaseline = \"ferry-en-de.model-v7\"\npoints = 2").check(0).unwrap();
        assert_eq!(d.condition, Condition::Drop { baseline: "ferry-en-de.model-v7".into(), points: 2.0 });
        assert!(d.selects("anything", &[("model".to_string(), "v8-rc".to_string())].into()) && !d.selects("x", &BTreeMap::new()));
        for (text, want) in [
            ("name = \"a\"\nwhen = \"below\"\nthreshold = 40", "give `session`"),
            ("name = \"a\"\nsession = \"s\"\nwhen = \"below\"", "needs `threshold`"),
            ("name = \"a\"\nsession = \"s\"\nwhen = \"drop\"\npoints = 1", "needs `baseline`"),
            ("name = \"a\"\nsession = \"s\"\nwhen = \"above\"", "not one of below, drop, decline"),
            ("name = \"a\"\nsession = \"s\"\nwhen = \"decline\"", "needs `points`"),
            ("name = \"a\"\nsession = \"s\"\nwhen = \"below\"\nthreshold = 140", "between 0 and 100"),
            ("name = \"a\"\nsession = \"s\"\nmetric = \"ter\"\nwhen = \"below\"\nthreshold = 4", "metric 'ter'"),
            ("name = \"a\"\nsession = \"s\"\nwindow = \"15 m\"\nwhen = \"below\"\nthreshold = 4", "window '15 m' is not recent, all, a duration"),
            ("name = \"a\"\nsession = \"s\"\nwindow = \"30s\"\nwhen = \"below\"\nthreshold = 4", "not between 60 s and 7 days"),
            ("name = \"a\"\nsession = \"s\"\nwindow = \"1h\"\nwhen = \"decline\"\npoints = 2", "`window` does not belong"),
            ("name = \"a b\"\nsession = \"s\"\nwhen = \"below\"\nthreshold = 4", "rule name"),
            ("name = \"a\"\nsession = \"s\"\nwhen = \"below\"\nthreshold = 4\n[extra_labels]\nseverity = \"page\"", "extra_labels: 'severity'"),
            ("name = \"a\"\nsession = \"s\"\nwhen = \"below\"\nthreshold = 4\n[annotations]\n\"run-book\" = \"x\"", "annotations: 'run-book'"),
            ("name = \"a\"\nlabels = { \"1x\" = \"y\" }\nwhen = \"below\"\nthreshold = 4", "labels: "),
        ] {
            let e = entry(text).check(0).unwrap_err();
            assert!(e.to_string().contains(want), "{text}: {e}");
        }
        assert!(toml::from_str::<RuleEntry>("name = \"a\"\nthreshhold = 3").is_err(), "unknown keys are refused");
        for (text, window, name) in [("recent", Window::Recent, "recent"), ("all", Window::All, "all"), ("15m", Window::Last(900), "15m"), ("90m", Window::Last(5400), "90m"), ("120m", Window::Last(7200), "2h"), ("3600s", Window::Last(3600), "1h"), ("7d", Window::Last(604_800), "7d")] {
            assert_eq!(Window::parse(text), Ok(window), "{text}");
            assert_eq!(window.name(), name);
        }
        assert_eq!(Window::parse("2000seg"), Ok(Window::Segments(2000)));
        assert_eq!(Window::Segments(2000).name(), "2000seg");
        assert!(Window::parse("99seg").is_err() && Window::parse("seg").is_err() && Window::parse("1000001seg").is_err());
        // Defaults: drop judges the last 1,800 segments through 200, below the recent window
        // through 400.
        let d = entry("name = \"d\"\nsession = \"s\"\nwhen = \"drop\"\nbaseline = \"p\"\npoints = 1").check(0).unwrap();
        assert_eq!((d.window, d.for_segments), (Window::Segments(DEFAULT_DROP_WINDOW_SEGMENTS), DEFAULT_DROP_FOR_SEGMENTS));
        let b = entry("name = \"b\"\nsession = \"s\"\nwhen = \"below\"\nthreshold = 40").check(0).unwrap();
        assert_eq!((b.window, b.for_segments), (Window::Recent, DEFAULT_FOR_SEGMENTS));
        assert!(Window::parse("8d").is_err() && Window::parse("m").is_err() && Window::parse("5").is_err() && Window::parse("99999999999999999999h").is_err());
        let twice = check_rules(&[entry("name = \"a\"\nsession = \"s\"\nwhen = \"below\"\nthreshold = 4"), entry("name = \"a\"\nsession = \"t\"\nwhen = \"below\"\nthreshold = 5")]);
        assert!(twice.unwrap_err().to_string().contains("declared twice"));
    }

    #[test]
    fn for_segments_counts_newly_scored_segments_and_is_the_default() {
        let m = |high: f64| Some(Measured { value: high - 1.0, low: high - 2.0, high, segments: 500, statistic: None, higher_is_worse: false });
        let plain = entry("name = \"f\"\nsession = \"s\"\nwhen = \"below\"\nthreshold = 45").check(0).unwrap();
        assert_eq!((plain.for_seconds, plain.for_segments), (DEFAULT_FOR_SECONDS, DEFAULT_FOR_SEGMENTS), "the default waits for segments");
        let timed = entry("name = \"f\"\nsession = \"s\"\nwhen = \"below\"\nthreshold = 45\nfor_seconds = 30").check(0).unwrap();
        assert_eq!((timed.for_seconds, timed.for_segments), (30, 0), "only for_seconds: time alone");
        let decline = entry("name = \"f\"\nsession = \"s\"\nwhen = \"decline\"\npoints = 2").check(0).unwrap();
        assert_eq!((decline.for_seconds, decline.for_segments), (0, 0), "decline: its test is the wait");
        let both = entry("name = \"f\"\nsession = \"s\"\nwhen = \"below\"\nthreshold = 45\nfor_seconds = 10\nfor_segments = 100").check(0).unwrap();
        let n = DEFAULT_FOR_SEGMENTS;
        let mut t = Tracker::new(0);
        assert_eq!(t.step(&plain, m(44.0), 0, 1_000), None);
        assert_eq!(t.state, State::Pending);
        assert_eq!(t.step(&plain, m(44.0), 3600, 1_000 + n - 1), None, "one segment short, however long it held");
        assert_eq!(t.step(&plain, m(44.0), 3601, 1_000 + n), Some(Transition::Fired));
        let mut t = Tracker::new(0);
        t.step(&both, m(44.0), 0, 0);
        assert_eq!(t.step(&both, m(44.0), 5, 500), None, "segments enough, 5 s are not 10");
        assert_eq!(t.step(&both, m(44.0), 10, 99), None, "10 s, but 99 segments");
        assert_eq!(t.step(&both, m(44.0), 10, 100), Some(Transition::Fired));
        // A pending alert whose condition lapses starts counting again.
        let mut t = Tracker::new(0);
        t.step(&plain, m(44.0), 0, 0);
        t.step(&plain, m(46.0), 1, n - 50);
        assert_eq!(t.state, State::Inactive);
        t.step(&plain, m(44.0), 2, n - 40);
        assert_eq!(t.step(&plain, m(44.0), 3, n + 100), None, "n - 60 segments since it held again");
        assert_eq!(t.step(&plain, m(44.0), 4, 2 * n - 40), Some(Transition::Fired));
    }

    #[test]
    fn wilson_interval_by_hand() {
        // 5 of 10: (0.2366, 0.7634) (Wilson 1927; Newcombe 1998, table I, from memory).
        let (lo, hi) = wilson(5, 10, WILSON_Z95).unwrap();
        assert!((lo - 0.2366).abs() < 5e-5 && (hi - 0.7634).abs() < 5e-5, "{lo} {hi}");
        // 0 of n: the lower bound is 0 and the upper z^2 / (n + z^2) (the formula at p = 0).
        let (lo, hi) = wilson(0, 20, WILSON_Z95).unwrap();
        assert_eq!(lo, 0.0);
        assert!((hi - WILSON_Z95 * WILSON_Z95 / (20.0 + WILSON_Z95 * WILSON_Z95)).abs() < 1e-12);
        // Symmetric in successes and failures; narrower with more trials; none without trials.
        let (a, b) = wilson(3, 40, WILSON_Z95).unwrap();
        let (c, d) = wilson(37, 40, WILSON_Z95).unwrap();
        assert!((a - (1.0 - d)).abs() < 1e-12 && (b - (1.0 - c)).abs() < 1e-12);
        let (e, f) = wilson(30, 400, WILSON_Z95).unwrap();
        assert!(e > a && f < b);
        assert_eq!(wilson(0, 0, WILSON_Z95), None);
    }

    #[test]
    fn flag_rate_rules_check_and_judge_the_lower_bound() {
        let r = entry("name = \"copies\"\nlabels = { lang = \"en-de\" }\nwhen = \"flag-rate\"\nguard = \"copy\"\nthreshold = 2\nmin_segments = 50\nfor_seconds = 0\nclear_margin = 0.5").check(0).unwrap();
        assert_eq!((r.condition.clone(), r.window), (Condition::FlagRate { guard: "copy".into(), threshold: 2.0 }, Window::All));
        assert!(r.describe().contains("copy guard") && r.describe().contains("above 2%"), "{}", r.describe());
        // Its alerts name the guard in the `metric` label, and their description speaks of it.
        assert_eq!(r.metric_label(), "guard:copy");
        assert!(r.description().starts_with("The copy guard flags"), "{}", r.description());
        for (text, want) in [
            ("when = \"flag-rate\"\nthreshold = 2", "needs `guard`"),
            ("when = \"flag-rate\"\nguard = \"colour\"\nthreshold = 2", "guard 'colour'"),
            ("when = \"flag-rate\"\nguard = \"copy\"", "needs `threshold`"),
            ("when = \"flag-rate\"\nguard = \"copy\"\nthreshold = 100", "percent"),
            ("when = \"flag-rate\"\nguard = \"copy\"\nthreshold = 2\nwindow = \"15m\"", "can only be `all`"),
            ("when = \"flag-rate\"\nguard = \"copy\"\nthreshold = 2\nmetric = \"bleu\"", "do not belong"),
            ("when = \"below\"\nguard = \"copy\"\nthreshold = 2", "`guard` belongs"),
        ] {
            let e = entry(&format!("name = \"a\"\nsession = \"s\"\n{text}")).check(0).unwrap_err();
            assert!(e.to_string().contains(want), "{text}: {e}");
        }
        // The measurement as the daemon makes it: rate and Wilson bounds in percent.
        let measured = |flagged: u64, decided: u64| {
            let (lo, hi) = wilson(flagged, decided, WILSON_Z95).unwrap();
            Some(Measured { value: 100.0 * flagged as f64 / decided as f64, low: 100.0 * lo, high: 100.0 * hi, segments: decided, statistic: None, higher_is_worse: false })
        };
        let mut t = Tracker::new(0);
        // 2 of 20 (10%, lower bound 2.8%): above the threshold, but fewer items than
        // min_segments: not judged.
        assert_eq!(t.step(&r, measured(2, 20), 1, 0), None);
        // 4 of 100 (4%): the lower bound (1.6%) is under 2%: no alert.
        assert_eq!(t.step(&r, measured(4, 100), 2, 0), None);
        assert_eq!(t.state, State::Inactive);
        // 12 of 200 (6%): lower bound 3.5%, above 2%: fires (for_seconds 0).
        assert_eq!(t.step(&r, measured(12, 200), 3, 0), Some(Transition::Fired));
        // 8 of 300 (2.7%, lower bound 1.36%): back under the threshold by more than the
        // clearing margin (0.5 points): resolves.
        let lo = wilson(8, 300, WILSON_Z95).unwrap().0 * 100.0;
        assert!(lo <= 1.5, "{lo}");
        assert_eq!(t.step(&r, measured(8, 300), 4, 0), Some(Transition::Resolved));
    }

    #[test]
    fn states_follow_for_duration_and_hysteresis() {
        let r = below(45.0, 30);
        let mut t = Tracker::new(0);
        // A score whose interval still reaches above the threshold does not count.
        assert_eq!(t.step(&r, m(46.0, 500), 0, 0), None);
        assert_eq!(t.state, State::Inactive);
        // Below, but too few segments: nothing.
        assert_eq!(t.step(&r, m(40.0, 99), 5, 0), None);
        assert_eq!(t.state, State::Inactive);
        assert_eq!(t.step(&r, m(44.0, 500), 10, 0), None);
        assert_eq!((t.state, t.since), (State::Pending, 10));
        // Back above for one evaluation: pending ends.
        assert_eq!(t.step(&r, m(45.2, 500), 15, 0), None);
        assert_eq!(t.state, State::Inactive);
        assert_eq!(t.step(&r, m(44.0, 500), 20, 0), None);
        assert_eq!(t.step(&r, m(43.0, 500), 49, 0), None, "29 s are not 30");
        assert_eq!(t.step(&r, m(43.0, 500), 50, 0), Some(Transition::Fired));
        assert_eq!(t.state, State::Firing);
        // Hysteresis: back at 45.5 (< 45 + 1) keeps firing; 46 resolves.
        assert_eq!(t.step(&r, m(45.5, 500), 55, 0), None);
        assert_eq!(t.state, State::Firing);
        assert_eq!(t.step(&r, m(46.0, 500), 60, 0), Some(Transition::Resolved));
        assert_eq!((t.state, t.since), (State::Inactive, 60));
        // No interval (or too few segments) resolves a firing alert: nothing to judge by.
        let zero = below(45.0, 0);
        let mut t = Tracker::new(0);
        assert_eq!(t.step(&zero, m(40.0, 500), 1, 0), Some(Transition::Fired), "for_seconds = 0 fires at once");
        assert_eq!(t.step(&zero, None, 2, 0), Some(Transition::Resolved));
    }

    #[test]
    fn a_drop_is_judged_on_the_difference_interval() {
        let r = entry("name = \"vs-prod\"\nsession = \"c\"\nwhen = \"drop\"\nbaseline = \"p\"\npoints = 2\nfor_seconds = 0\nmin_segments = 1\nclear_margin = 0.5").check(0).unwrap();
        let mut t = Tracker::new(0);
        assert_eq!(t.step(&r, m(-1.9, 300), 1, 0), None, "upper bound -1.9 is not below -2");
        assert_eq!(t.step(&r, m(-2.1, 300), 2, 0), Some(Transition::Fired));
        assert_eq!(t.step(&r, m(-1.6, 300), 3, 0), None, "-1.6 < -2 + 0.5: still firing");
        assert_eq!(t.step(&r, m(-1.5, 300), 4, 0), Some(Transition::Resolved));
    }
}
