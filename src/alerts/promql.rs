//! Alert rules rendered as Prometheus recording and alerting rules (`mtgauge rules`): the same
//! `[[alert]]` definitions the daemon evaluates, judged by Prometheus over the fleet's summed
//! counters and per-replicate series (`mtgauge_replicate_*_total`, the first
//! `exported_resamples` replicates of every session).
//!
//! Pure: rules in, YAML text out.
//!
//! # What is rendered
//! `below` and `drop` rules over the `all` window (each replica's counters, summed) or a time
//! window (`increase()` over it, summed), and `flag-rate` rules (the guard counters
//! `mtgauge_guard_{checked,flagged,undecided}_total`, summed over the replicas). Not rendered,
//! and listed in the output's header: `recent` windows (a count of segments, which Prometheus
//! cannot select) and `decline` rules (a sequential test over the stream, in the daemon only).
//!
//! One group, in dependency order (a rule reads only rules above it, evaluated at the same
//! timestamp): per (metric, window) the replicate scores and the scored-segment count; per rule
//! the upper bound it judges (`session_rule:mtgauge_alert_bound:quantile`, label `rule`); then
//! the alerting rules.
//! - replicate scores: the formulas of `deploy/prometheus/mtgauge-rules.yml` (BLEU of Papineni
//!   et al. 2002 unsmoothed over the exported orders; chrF of Popović 2015/2017 with beta 2)
//!   applied to each replicate's sums over the replicas;
//! - `below`: the `Q`-quantile by session of the replicate scores, Q = (1 + level) / 2 (0.975
//!   for the 95% interval): its upper bound;
//! - `drop`: the same quantile of the per-replicate difference (session - baseline), paired by
//!   replicate: the same segment has the same weights in both sessions;
//! - `flag-rate`: the lower bound of the 95% Wilson (1927) score interval of the guard's flagged
//!   share of the items it decided on (checked minus undecided), in percent, as the daemon's
//!   [`super::rules::wilson`] computes it; it fires above the threshold, resolves at or below
//!   threshold - clear_margin, and `min_segments` counts the decided items.
//!
//! An alert's condition is the daemon's: the bound below the limit (threshold, or -points),
//! or, once firing (the `ALERTS` series Prometheus keeps for its own alerts), below the limit
//! plus `clear_margin`; with at least `min_segments` scored segments in the window (for `drop`,
//! in both sessions' windows); for `for_seconds` (a rule's `for_segments` is the daemon's only:
//! Prometheus sees no segment clock, and the rendered rule says so in a comment). Its labels are the daemon's (alertname,
//! session, severity, metric and the rule's extra labels), so that the same alert from the
//! daemon and from Prometheus is one alert at Alertmanager.
//!
//! Differences from the daemon, by construction: PromQL's quantile interpolates between
//! neighbouring replicate scores (the daemon takes ranks), it sees the exported replicates only
//! (`serve --exported-resamples`, default 100), `increase()` extrapolates to the window's
//! edges, `all` is what the replicas' counters hold (since each replica's start), and the
//! formulas assume unsmoothed BLEU and chrF beta 2.

use std::collections::BTreeSet;
use std::fmt::Write;

use super::rules::{Condition, Rule, Window, WILSON_Z95};
use crate::metric::resample::DEFAULT_LEVEL;
use crate::metric::Metric;

/// The record that holds each rule's judged bound (label `rule`).
pub const BOUND_RECORD: &str = "session_rule:mtgauge_alert_bound:quantile";
/// The group every rendered rule is in.
pub const GROUP: &str = "mtgauge-alert-rules";

/// The rendered file, and the rules left out with the reason.
#[derive(Debug, Clone, PartialEq)]
pub struct Rendered {
    /// Prometheus rule file (YAML).
    pub yaml: String,
    /// Rules rendered.
    pub rendered: Vec<String>,
    /// Rules not rendered: (name, why).
    pub skipped: Vec<(String, String)>,
}

/// Why a rule cannot be rendered, if it cannot.
pub fn daemon_only(rule: &Rule) -> Option<&'static str> {
    if rule.external.is_some() {
        return Some("a rule on an external metric judges the bootstrap replicates of its values, which the daemon keeps (Prometheus has the fleet mean and standard deviation: group mtgauge-fleet-external of mtgauge-rules.yml)");
    }
    match (&rule.condition, rule.window) {
        (Condition::Decline { .. }, _) => Some("a `decline` rule is a sequential test over the stream of chunks: the daemon evaluates it, Prometheus cannot"),
        (_, Window::Recent) => Some("the `recent` window is the session's last segments by count, which Prometheus cannot select: use `all` or a time window such as 15m"),
        (_, Window::Segments(_)) => Some("a window of the last N segments is a count of segments, which Prometheus cannot select: use `all` or a time window such as 15m"),
        _ => None,
    }
}

/// The operation part of a record name for a window: `sum` (since start) or `increase15m`.
fn op(w: Window) -> String {
    match w {
        Window::Last(_) => format!("increase{}", w.name()),
        _ => "sum".into(),
    }
}

/// `sum by (by) (family)` for `all`, `sum by (by) (increase(family[w]))` for a time window.
fn agg(family: &str, by: &str, w: Window) -> String {
    match w {
        Window::Last(_) => format!("sum by ({by}) (increase({family}[{}]))", w.name()),
        _ => format!("sum by ({by}) ({family})"),
    }
}

/// A PromQL string literal.
pub fn promql_string(s: &str) -> String {
    let mut out = String::from("\"");
    for c in s.chars() {
        match c {
            '"' => out.push_str("\\\""),
            '\\' => out.push_str("\\\\"),
            '\n' => out.push_str("\\n"),
            '\r' => out.push_str("\\r"),
            '\t' => out.push_str("\\t"),
            c => out.push(c),
        }
    }
    out.push('"');
    out
}

/// A YAML double-quoted scalar (JSON strings are valid YAML).
fn yaml_string(s: &str) -> String {
    serde_json::Value::String(s.to_owned()).to_string()
}

/// Annotation text as Prometheus shows it literally (`{{` would start a template).
fn literal(s: &str) -> String {
    s.replace("{{", "{{ \"{{\" }}")
}

/// The replicate-score record of a metric over a window, and its selector part for the metric.
fn replicate_record(m: Metric, w: Window) -> (String, String) {
    match m {
        Metric::Bleu => (format!("session_replicate:mtgauge_alert_bleu:{}", op(w)), String::new()),
        _ => (format!("session_metric_replicate:mtgauge_alert_chrf:{}", op(w)), format!("metric={}", promql_string(m.name()))),
    }
}

fn segments_record(w: Window) -> String {
    format!("session:mtgauge_alert_segments:{}", op(w))
}

/// Per (session, guard): items flagged, summed over the replicas.
const GUARD_FLAGGED_RECORD: &str = "session_guard:mtgauge_alert_guard_flagged:sum";
/// Per (session, guard): items the guard decided on (checked minus undecided), summed over the
/// replicas; no series while it is 0 (a share of nothing is not judged, as in the daemon).
const GUARD_DECIDED_RECORD: &str = "session_guard:mtgauge_alert_guard_decided:sum";

/// The guard records `flag-rate` rules read.
fn guard_series(out: &mut String) {
    record(out, GUARD_FLAGGED_RECORD, "sum by (session, guard) (mtgauge_guard_flagged_total)", &[]);
    record(
        out,
        GUARD_DECIDED_RECORD,
        "  (\n      sum by (session) (mtgauge_guard_checked_total)\n    - on (session) group_right\n      sum by (session, guard) (mtgauge_guard_undecided_total)\n  )\n> 0",
        &[],
    );
}

/// The record and selector a rule's `min_segments` is judged on.
fn count_selector(rule: &Rule) -> String {
    match &rule.condition {
        Condition::FlagRate { guard, .. } => format!("{GUARD_DECIDED_RECORD}{{guard={}}}", promql_string(guard)),
        _ => segments_record(rule.window),
    }
}

/// A selector `{a="x", b="y"}` of the non-empty parts (empty string when none).
fn selector(parts: &[String]) -> String {
    let parts: Vec<&String> = parts.iter().filter(|p| !p.is_empty()).collect();
    if parts.is_empty() {
        String::new()
    } else {
        format!("{{{}}}", parts.iter().map(|p| p.as_str()).collect::<Vec<_>>().join(", "))
    }
}

/// Push a recording rule (expression lines indented under `expr: |2`).
fn record(out: &mut String, name: &str, expr: &str, labels: &[(&str, &str)]) {
    let _ = writeln!(out, "      - record: {name}");
    let _ = writeln!(out, "        expr: |2");
    for line in expr.lines() {
        let _ = writeln!(out, "            {line}");
    }
    if !labels.is_empty() {
        let _ = writeln!(out, "        labels:");
        for (k, v) in labels {
            let _ = writeln!(out, "          {k}: {}", yaml_string(v));
        }
    }
    out.push('\n');
}

/// The series rules of one (metric, window): replicate scores.
fn series(out: &mut String, m: Metric, w: Window) {
    let o = op(w);
    if m == Metric::Bleu {
        let by = "session, replicate, order";
        let p = format!("session_replicate_order:mtgauge_alert_bleu_precision:{o}");
        record(out, &p, &format!("  {}\n/\n  clamp_min({}, 1)", agg("mtgauge_replicate_bleu_matches_total", by, w), agg("mtgauge_replicate_bleu_ngrams_total", by, w)), &[]);
        let by = "session, replicate";
        let expr = format!(
            "  100 * exp(clamp_max(\n      1\n    -\n        {}\n      /\n        ({} > 0),\n    0))\n* on (session, replicate)\n  exp(avg by (session, replicate) (ln({p})))",
            agg("mtgauge_replicate_reference_tokens_total", by, w),
            agg("mtgauge_replicate_hypothesis_tokens_total", by, w)
        );
        record(out, &replicate_record(m, w).0, &expr, &[]);
    } else if !out.contains(&format!("record: {}\n", replicate_record(m, w).0)) {
        // chrF and chrF++ share their records (label metric).
        let by = "session, metric, replicate, kind, order";
        let (matches, hyp, rf) = (agg("mtgauge_replicate_chrf_matches_total", by, w), agg("mtgauge_replicate_chrf_hypothesis_ngrams_total", by, w), agg("mtgauge_replicate_chrf_reference_ngrams_total", by, w));
        let p = format!("session_metric_replicate:mtgauge_alert_chrf_precision:{o}");
        let r = format!("session_metric_replicate:mtgauge_alert_chrf_recall:{o}");
        let mean = "avg by (session, metric, replicate)";
        record(out, &p, &format!("  {mean} (\n      {matches}\n    /\n      ({hyp} > 0)\n  )\nor on (session, metric, replicate)\n  0 * {mean} (\n      {matches}\n    /\n      ({rf} > 0)\n  )"), &[]);
        record(out, &r, &format!("  {mean} (\n      {matches}\n    /\n      ({rf} > 0)\n  )\nor on (session, metric, replicate)\n  0 * {p}"), &[]);
        record(out, &replicate_record(m, w).0, &format!("  100 * (1 + 2^2) * {p} * {r}\n/\n  ((2^2 * {p} + {r}) > 0)\nor on (session, metric, replicate)\n  0 * {p}"), &[]);
    }
}

/// Render `rules` (those that can be); `source` names the file in the header.
pub fn render(rules: &[Rule], source: &str) -> Rendered {
    let q = (1.0 + DEFAULT_LEVEL) / 2.0;
    let (mut rendered, mut skipped) = (Vec::new(), Vec::new());
    let mut keep = Vec::new();
    for r in rules {
        match daemon_only(r) {
            Some(why) => skipped.push((r.name.clone(), why.to_owned())),
            None => {
                rendered.push(r.name.clone());
                keep.push(r);
            }
        }
    }
    let mut out = String::new();
    let _ = writeln!(out, "# Prometheus recording and alerting rules rendered by `mtgauge rules` from {source}: the");
    let _ = writeln!(out, "# [[alert]] rules the mtgauge daemon evaluates itself, judged here over the fleet's summed");
    let _ = writeln!(out, "# counters and the per-replicate series of `serve --exported-resamples` (default 100).");
    let _ = writeln!(out, "# Do not edit: change the [[alert]] entries and render again.");
    let _ = writeln!(out, "#");
    let _ = writeln!(out, "# Each alert fires when the upper bound of the {:.0}% bootstrap interval (the {q} quantile of", DEFAULT_LEVEL * 100.0);
    let _ = writeln!(out, "# the replicate scores, or of the paired per-replicate differences for `drop`) is below the");
    let _ = writeln!(out, "# rule's limit, with the rule's minimum of scored segments, for its `for` duration; a firing");
    let _ = writeln!(out, "# alert resolves once the bound is back above the limit by clear_margin. Alerts carry the");
    let _ = writeln!(out, "# daemon's labels, so the same alert from both is one alert at Alertmanager. BLEU is rendered");
    let _ = writeln!(out, "# unsmoothed and chrF with beta 2; `all` is what the replicas' counters hold; increase()");
    let _ = writeln!(out, "# extrapolates to a time window's edges. BLEU and chrF are automatic proxies for translation");
    let _ = writeln!(out, "# quality, comparable only under the same tokenizer, references and configuration.");
    let _ = writeln!(out, "# A `flag-rate` alert fires when the lower bound of the 95% Wilson interval of the share of");
    let _ = writeln!(out, "# items a reference-free guard flagged (of those it decided on, over the replicas' summed");
    let _ = writeln!(out, "# counters) is above the rule's threshold, and resolves once it is clear_margin below it.");
    let _ = writeln!(out, "#");
    if rendered.is_empty() {
        let _ = writeln!(out, "# Rendered: none.");
    } else {
        let _ = writeln!(out, "# Rendered: {}.", rendered.join(", "));
    }
    for (name, why) in &skipped {
        let _ = writeln!(out, "# Not rendered (daemon only): {name}: {why}.");
    }
    out.push('\n');
    if keep.is_empty() {
        out.push_str("groups: []\n");
        return Rendered { yaml: out, rendered, skipped };
    }
    let _ = writeln!(out, "groups:\n  - name: {GROUP}\n    rules:");
    // Series per (metric, window), and segments per window, in a stable order; the guard
    // records once for any `flag-rate` rule.
    let (flag, scores): (Vec<&Rule>, Vec<&Rule>) = keep.iter().copied().partition(|r| matches!(r.condition, Condition::FlagRate { .. }));
    if !flag.is_empty() {
        guard_series(&mut out);
    }
    let needed: BTreeSet<(usize, String, u64)> = scores.iter().map(|r| (Metric::ALL.iter().position(|m| *m == r.metric).unwrap_or(0), r.window.name(), window_key(r.window))).collect();
    let windows: BTreeSet<(u64, String)> = scores.iter().map(|r| (window_key(r.window), r.window.name())).collect();
    for (key, _) in &windows {
        let w = scores.iter().map(|r| r.window).find(|w| window_key(*w) == *key).unwrap_or(Window::All);
        record(&mut out, &segments_record(w), &agg("mtgauge_segments_total{outcome=\"scored\"}", "session", w), &[]);
    }
    for (mi, _, key) in &needed {
        let w = scores.iter().map(|r| r.window).find(|w| window_key(*w) == *key).unwrap_or(Window::All);
        series(&mut out, Metric::ALL[*mi], w);
    }
    for r in &keep {
        bound(&mut out, r, q);
    }
    for r in &keep {
        alert(&mut out, r);
    }
    Rendered { yaml: out, rendered, skipped }
}

/// Order windows: `all` first, then by length.
fn window_key(w: Window) -> u64 {
    match w {
        Window::Last(s) => s,
        _ => 0,
    }
}

/// The session selector parts of a rule's own session.
fn own_session(rule: &Rule) -> Vec<String> {
    rule.session.iter().map(|s| format!("session={}", promql_string(s))).collect()
}

/// `and on (session) (mtgauge_session_info{...} == 1)` for a label selector, else empty.
fn label_filter(rule: &Rule) -> String {
    if rule.labels.is_empty() {
        return String::new();
    }
    let parts: Vec<String> = rule.labels.iter().map(|(k, v)| format!("{k}={}", promql_string(v))).collect();
    format!("\nand on (session)\n  (mtgauge_session_info{} == 1)", selector(&parts))
}

fn bound(out: &mut String, rule: &Rule, q: f64) {
    if let Condition::FlagRate { guard, .. } = &rule.condition {
        let mut own = own_session(rule);
        own.push(format!("guard={}", promql_string(guard)));
        let (f, n) = (format!("{GUARD_FLAGGED_RECORD}{}", selector(&own)), format!("{GUARD_DECIDED_RECORD}{}", selector(&own)));
        // Wilson (1927): (p + z^2/2n - z sqrt(p(1 - p)/n + z^2/4n^2)) / (1 + z^2/n), p = f/n.
        let z = num(WILSON_Z95);
        let expr = format!(
            "clamp_min(\n    100 * (\n        {f} / {n}\n      + {z}^2 / (2 * {n})\n      - {z} * sqrt(\n            {f} / {n} * (1 - {f} / {n}) / {n}\n          + {z}^2 / (4 * {n}^2)\n        )\n    )\n  /\n    (1 + {z}^2 / {n}),\n  0)"
        );
        record(out, BOUND_RECORD, &format!("{expr}{}", label_filter(rule)), &[("rule", &rule.name)]);
        return;
    }
    let (rec, metric_part) = replicate_record(rule.metric, rule.window);
    let by = if rule.metric == Metric::Bleu { "session" } else { "session, metric" };
    let mut own = own_session(rule);
    own.push(metric_part.clone());
    let expr = match &rule.condition {
        Condition::Below { .. } => format!("quantile by ({by}) ({q}, {rec}{})", selector(&own)),
        Condition::Drop { baseline, .. } => {
            let base = selector(&[format!("session={}", promql_string(baseline)), metric_part]);
            format!("quantile by ({by}) ({q},\n    {rec}{}\n  - ignoring (session) group_left\n    {rec}{base}\n)", selector(&own))
        }
        Condition::Decline { .. } => unreachable!("decline rules are not rendered"),
        Condition::FlagRate { .. } => unreachable!("flag-rate rules took the branch above"),
    };
    let expr = format!("{expr}{}", label_filter(rule));
    record(out, BOUND_RECORD, &expr, &[("rule", &rule.name)]);
}

/// A number as PromQL reads it, without trailing noise.
fn num(x: f64) -> String {
    let s = format!("{x}");
    if s.contains('e') {
        format!("{x:.6}")
    } else {
        s
    }
}

fn alert(out: &mut String, rule: &Rule) {
    // The bound against the limit: the upper bound below it, or for `flag-rate` the lower
    // bound above it; a firing alert holds until clear_margin past the limit.
    let (cmp, limit, hold) = match &rule.condition {
        Condition::Below { threshold } => ("<", *threshold, threshold + rule.clear_margin),
        Condition::Drop { points, .. } => ("<", -points, -points + rule.clear_margin),
        Condition::FlagRate { threshold, .. } => (">", *threshold, threshold - rule.clear_margin),
        Condition::Decline { .. } => unreachable!("decline rules are not rendered"),
    };
    let b = format!("max by (session) ({BOUND_RECORD}{{rule={}}})", promql_string(&rule.name));
    let firing = format!("ALERTS{{alertname={}, alertstate=\"firing\"}}", promql_string(&rule.name));
    let seg = count_selector(rule);
    let mut expr = format!(
        "  (\n      {b} {cmp} {}\n    or\n      (\n          {b} {cmp} {}\n        and on (session)\n          {firing}\n      )\n  )\nand on (session)\n  {seg} >= {}",
        num(limit),
        num(hold),
        rule.min_segments
    );
    if let Condition::Drop { baseline, .. } = &rule.condition {
        let _ = write!(expr, "\nand on ()\n  {seg}{{session={}}} >= {}", promql_string(baseline), rule.min_segments);
    }
    let _ = writeln!(out, "      - alert: {}", rule.name);
    let _ = writeln!(out, "        expr: |2");
    for line in expr.lines() {
        let _ = writeln!(out, "            {line}");
    }
    if rule.for_segments > 0 {
        let _ = writeln!(out, "        # for_segments = {}: the daemon also waits for that many newly scored segments; Prometheus counts time only", rule.for_segments);
    }
    let _ = writeln!(out, "        for: {}s", rule.for_seconds);
    let _ = writeln!(out, "        labels:");
    let mut labels = rule.extra_labels.clone();
    labels.insert("severity".into(), rule.severity.clone());
    labels.insert("metric".into(), rule.metric_label());
    for (k, v) in &labels {
        let _ = writeln!(out, "          {k}: {}", yaml_string(v));
    }
    let _ = writeln!(out, "        annotations:");
    let mut ann: std::collections::BTreeMap<String, String> = rule.annotations.iter().map(|(k, v)| (k.clone(), literal(v))).collect();
    ann.entry("summary".into()).or_insert_with(|| literal(&format!("{}: {}", rule.name, describe(rule))) + " on session {{ $labels.session }}");
    let measured = match &rule.condition {
        Condition::FlagRate { .. } => "lower bound of the 95% Wilson interval of the flagged share {{ $value | printf \"%.2f\" }}% (Prometheus, over the replicas' summed guard counters)".to_owned(),
        _ => format!("upper bound of the {:.0}% interval {{{{ $value | printf \"%.2f\" }}}} (Prometheus, over the exported replicates)", DEFAULT_LEVEL * 100.0),
    };
    ann.insert("measured".into(), measured);
    ann.insert("description".into(), literal(&rule.description()));
    for (k, v) in &ann {
        let _ = writeln!(out, "          {k}: {}", yaml_string(v));
    }
    out.push('\n');
}

/// The condition in words (as the daemon's reports say it).
fn describe(rule: &Rule) -> String {
    rule.describe()
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::alerts::rules::{check_rules, RuleEntry};

    fn rules(text: &str) -> Vec<Rule> {
        #[derive(serde::Deserialize)]
        struct F {
            alert: Vec<RuleEntry>,
        }
        let f: F = toml::from_str(text).unwrap();
        check_rules(&f.alert).unwrap()
    }

    const RULES: &str = r#"
[[alert]]
name = "floor"
session = "ferry.v8"
window = "15m"
when = "below"
threshold = 45
clear_margin = 0.5
min_segments = 300
for_seconds = 120
[alert.extra_labels]
team = "ferry \"mt\""
[alert.annotations]
runbook = "see {{ the wiki }}"

[[alert]]
name = "worse"
labels = { model = "v8-rc" }
metric = "chrf"
window = "all"
when = "drop"
baseline = "ferry.v7"
points = 2

[[alert]]
name = "recent-floor"
session = "ferry.v8"
when = "below"
threshold = 40

[[alert]]
name = "slide"
session = "ferry.v7"
when = "decline"
points = 2
"#;

    #[test]
    fn renders_below_and_drop_and_lists_what_it_cannot() {
        let r = render(&rules(RULES), "serve.toml");
        assert_eq!(r.rendered, ["floor", "worse"]);
        assert_eq!(r.skipped.iter().map(|(n, _)| n.as_str()).collect::<Vec<_>>(), ["recent-floor", "slide"]);
        let y = &r.yaml;
        assert!(y.contains("# Not rendered (daemon only): recent-floor: the `recent` window"), "{y}");
        // One segments record per window, replicate scores per (metric, window).
        assert_eq!(y.matches("- record: session:mtgauge_alert_segments:sum\n").count(), 1);
        assert_eq!(y.matches("- record: session:mtgauge_alert_segments:increase15m\n").count(), 1);
        assert!(y.contains("sum by (session) (increase(mtgauge_segments_total{outcome=\"scored\"}[15m]))"));
        assert_eq!(y.matches("- record: session_replicate:mtgauge_alert_bleu:increase15m\n").count(), 1);
        assert_eq!(y.matches("- record: session_metric_replicate:mtgauge_alert_chrf:sum\n").count(), 1);
        // The below rule's bound: the 0.975 quantile of its session's replicate scores.
        assert!(y.contains("quantile by (session) (0.975, session_replicate:mtgauge_alert_bleu:increase15m{session=\"ferry.v8\"})"), "{y}");
        // The drop rule: paired differences against the baseline, label selector by session info.
        assert!(y.contains("  - ignoring (session) group_left\n"));
        assert!(y.contains("session_metric_replicate:mtgauge_alert_chrf:sum{session=\"ferry.v7\", metric=\"chrf\"}"), "{y}");
        assert!(y.contains("(mtgauge_session_info{model=\"v8-rc\"} == 1)"));
        // Conditions with hysteresis and guards.
        assert!(y.contains("{rule=\"floor\"}) < 45\n") && y.contains("{rule=\"floor\"}) < 45.5\n"), "{y}");
        assert!(y.contains("{rule=\"worse\"}) < -2\n") && y.contains("{rule=\"worse\"}) < -1.5\n"));
        assert!(y.contains("ALERTS{alertname=\"floor\", alertstate=\"firing\"}"));
        assert!(y.contains("session:mtgauge_alert_segments:increase15m >= 300\n"));
        assert!(y.contains("session:mtgauge_alert_segments:sum{session=\"ferry.v7\"} >= 200\n"), "drop: the baseline's guard too");
        assert!(y.contains("        for: 120s\n") && y.contains("        for: 0s\n"));
        assert!(y.contains(&format!("        # for_segments = {}: the daemon also waits", crate::alerts::rules::DEFAULT_DROP_FOR_SEGMENTS)), "a rule with the default for-duration says what Prometheus cannot count: {y}");
        // Labels and annotations quoted; template braces of user text kept literal.
        assert!(y.contains("          team: \"ferry \\\"mt\\\"\"\n"), "{y}");
        assert!(y.contains("          metric: \"chrf\"\n") && y.contains("          severity: \"warning\"\n"));
        assert!(y.contains("runbook: \"see {{ \\\"{{\\\" }} the wiki }}\""), "{y}");
        assert!(y.contains("automatic proxy"));
        // Dependency order: every record is defined above its first use.
        let first_def = |name: &str| y.find(&format!("- record: {name}\n"));
        for name in ["session_replicate_order:mtgauge_alert_bleu_precision:increase15m", "session_replicate:mtgauge_alert_bleu:increase15m", "session_metric_replicate:mtgauge_alert_chrf_precision:sum", BOUND_RECORD] {
            let def = first_def(name).unwrap_or_else(|| panic!("{name} not recorded"));
            let used = y.find(&format!("{name}{{")).or_else(|| y.find(&format!("({name})"))).or_else(|| y.find(&format!("* {name}"))).unwrap();
            assert!(def < used, "{name} used before it is recorded");
        }
    }

    #[test]
    fn renders_flag_rate_rules_with_the_wilson_bound_of_the_summed_guard_counters() {
        let text = "[[alert]]\nname = \"copies\"\nlabels = { lang = \"en-de\" }\nwhen = \"flag-rate\"\nguard = \"copy\"\nthreshold = 2\nmin_segments = 150\nclear_margin = 0.5\n\n\
                    [[alert]]\nname = \"loops\"\nsession = \"ferry.v8\"\nwhen = \"flag-rate\"\nguard = \"repetition\"\nthreshold = 1\n";
        let r = render(&rules(text), "serve.toml");
        assert_eq!(r.rendered, ["copies", "loops"]);
        assert!(r.skipped.is_empty());
        let y = &r.yaml;
        // The guard records once, before the bounds that read them; no score series.
        assert_eq!(y.matches(&format!("- record: {GUARD_FLAGGED_RECORD}\n")).count(), 1, "{y}");
        assert_eq!(y.matches(&format!("- record: {GUARD_DECIDED_RECORD}\n")).count(), 1);
        assert!(!y.contains("mtgauge_alert_segments") && !y.contains("mtgauge_replicate_"), "{y}");
        assert!(y.find(&format!("- record: {GUARD_DECIDED_RECORD}\n")) < y.find(&format!("- record: {BOUND_RECORD}\n")));
        // Decided = checked - undecided, per (session, guard), over the replicas.
        assert!(y.contains("sum by (session) (mtgauge_guard_checked_total)\n") && y.contains("- on (session) group_right\n") && y.contains("sum by (session, guard) (mtgauge_guard_undecided_total)\n"), "{y}");
        // The bound: Wilson's lower bound in percent, of the rule's guard (and session), with
        // the label filter through the session info.
        let f = format!("{GUARD_FLAGGED_RECORD}{{guard=\"copy\"}}");
        let n = format!("{GUARD_DECIDED_RECORD}{{guard=\"copy\"}}");
        assert!(y.contains(&format!("{f} / {n}\n")) && y.contains("- 1.959963984540054 * sqrt("), "{y}");
        assert!(y.contains(&format!("(1 + 1.959963984540054^2 / {n})")), "{y}");
        assert!(y.contains("(mtgauge_session_info{lang=\"en-de\"} == 1)"));
        assert!(y.contains(&format!("{GUARD_FLAGGED_RECORD}{{session=\"ferry.v8\", guard=\"repetition\"}}")), "{y}");
        // Fires above the threshold, holds above threshold - clear_margin, on decided items.
        assert!(y.contains("{rule=\"copies\"}) > 2\n") && y.contains("{rule=\"copies\"}) > 1.5\n"), "{y}");
        assert!(y.contains(&format!("  {n} >= 150\n")), "{y}");
        assert!(y.contains("          metric: \"guard:copy\"\n") && y.contains("          metric: \"guard:repetition\"\n"), "{y}");
        assert!(y.contains("lower bound of the 95% Wilson interval of the flagged share"));
        assert!(y.contains("The copy guard flags likely broken output"));
    }

    #[test]
    fn nothing_to_render_is_an_empty_rule_file() {
        let r = render(&rules("[[alert]]\nname = \"a\"\nsession = \"s\"\nwhen = \"below\"\nthreshold = 30\n"), "x.toml");
        assert!(r.rendered.is_empty() && r.yaml.ends_with("groups: []\n"));
    }

    #[test]
    fn promql_strings_are_escaped() {
        assert_eq!(promql_string("a\"b\\c\nd"), "\"a\\\"b\\\\c\\nd\"");
    }
}
