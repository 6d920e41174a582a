//! The status page on the metrics/admin listener: `GET /` is an HTML page of every session
//! (labels, cumulative and recent scores with intervals, counts, unknown and rejected shares,
//! alert states) with a chart per session of its score over the last hour from the history,
//! and `GET /api/v1/overview` the same as JSON, which the page fetches to refresh its cards in
//! place. A session with external metrics also shows each one's mean since start and over the
//! recent window, with intervals, and a small chart of the first one's mean per step from its
//! history, scaled inside the metric's declared range.
//!
//! Charts are SVG drawn here, on the server, from the history's steps: no JavaScript library,
//! nothing fetched from elsewhere, and the first response is already complete (a page opened
//! without scripts, or saved with an incident, shows the charts).

use std::fmt::Write as _;

use crate::metric::resample::DEFAULT_LEVEL;
use crate::metric::scores::corpus_score;
use crate::metric::Metric;

use super::alerting::AlertSpan;
use super::history::{external_points, points, HistoryQuery, Point};
use super::state::{unix_now, State};
use crate::session::Session;

/// A time range the page can chart: its span and step.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct ChartRange {
    /// How it is asked for (`?range=`) and shown.
    pub key: &'static str,
    /// Seconds it spans.
    pub seconds: i64,
    /// Seconds per step (whole minutes; whole hours read the hourly buckets).
    pub step: i64,
}

/// The ranges the page offers, the first the default: an hour by minute, 6 hours by 5 minutes,
/// a day by 20 minutes, a week by 2 hours (60 to 84 points each).
pub const CHART_RANGES: [ChartRange; 4] = [
    ChartRange { key: "1h", seconds: 3_600, step: 60 },
    ChartRange { key: "6h", seconds: 6 * 3_600, step: 300 },
    ChartRange { key: "24h", seconds: 86_400, step: 1_200 },
    ChartRange { key: "7d", seconds: 7 * 86_400, step: 7_200 },
];

impl ChartRange {
    /// The range named in a query string (`range=24h`), else the default.
    pub fn from_query(query: &str) -> ChartRange {
        let asked = query.split('&').filter_map(|kv| kv.split_once('=')).find(|(k, _)| *k == "range").map(|(_, v)| v);
        CHART_RANGES.into_iter().find(|r| Some(r.key) == asked).unwrap_or(CHART_RANGES[0])
    }

    /// "last hour", "last 6 hours", "last 7 days".
    fn words(&self) -> String {
        match self.seconds {
            3_600 => "last hour".into(),
            s if s % 86_400 == 0 && s > 86_400 => format!("last {} days", s / 86_400),
            s => format!("last {} hours", s / 3_600),
        }
    }
}
/// Seconds between refreshes of the page.
pub const REFRESH_SECS: u32 = 5;
/// Seconds over which a card's segments per second are measured (the last five minutes).
pub const RATE_SECS: i64 = 300;
/// Approximate-randomization trials of the page's comparison (fewer than `compare`'s default:
/// it is computed again at every refresh; the smallest p it can show is 1/1001).
pub const PAGE_COMPARE_TRIALS: usize = 1_000;
/// Chart size in SVG user units.
const CHART_W: f64 = 640.0;
const CHART_H: f64 = 180.0;
const PAD_L: f64 = 44.0;
const PAD_B: f64 = 24.0;
const PAD_T: f64 = 10.0;

/// Escape text for HTML and SVG.
fn esc(s: &str) -> String {
    s.replace('&', "&amp;").replace('<', "&lt;").replace('>', "&gt;").replace('"', "&quot;").replace('\'', "&#39;")
}

fn score_text(score: Option<f64>, iv: Option<(f64, f64)>) -> String {
    match (score, iv) {
        (Some(s), Some((l, h))) => format!("{s:.2} <span class=\"iv\">[{l:.2}, {h:.2}]</span>"),
        (Some(s), None) => format!("{s:.2}"),
        _ => "&ndash;".into(),
    }
}

/// A mean of an external metric (its own units) and its interval, at `places` decimals.
fn mean_text(mean: Option<f64>, iv: Option<(f64, f64)>, places: usize) -> String {
    match (mean, iv) {
        (Some(m), Some((l, h))) => format!("{m:.places$} <span class=\"iv\">[{l:.places$}, {h:.places$}]</span>"),
        (Some(m), None) => format!("{m:.places$}"),
        _ => "&ndash;".into(),
    }
}

/// Decimals that show a value of a metric ranging `low..high` (2 for a range of 10 or more,
/// one more per factor of ten less, at most 6).
fn places_for(low: f64, high: f64) -> usize {
    let span = (high - low).max(1e-6);
    (3.0 - span.log10().floor()).clamp(2.0, 6.0) as usize
}

/// One external metric's figures on a card.
#[derive(Debug, serde::Serialize)]
pub struct ExternalFigure {
    name: String,
    low: f64,
    high: f64,
    lower_is_better: bool,
    /// Values counted since start (or reset).
    count: u64,
    /// Mean since start, and its interval from the session's replicates.
    cumulative: Option<f64>,
    cumulative_interval: Option<(f64, f64)>,
    /// Mean over the `recent` window, and its interval.
    recent: Option<f64>,
    recent_interval: Option<(f64, f64)>,
}

/// The external figures of a session (declaration order), as `status` derives them: the
/// means of the exact sums, the intervals from the replicates (none without them).
fn external_figures(s: &Session) -> Vec<ExternalFigure> {
    let specs = s.spec().external.specs();
    if specs.is_empty() {
        return Vec::new();
    }
    let cum = s.external();
    let (recent, recent_reps) = s.external_recent();
    let iv = |r: Option<&crate::external::replicates::ExternalReplicates>, i: usize, decimals: u32| r.and_then(|r| r.interval(i, decimals, DEFAULT_LEVEL)).map(|iv| (iv.low, iv.high));
    specs
        .iter()
        .enumerate()
        .map(|(i, e)| ExternalFigure {
            name: e.name.clone(),
            low: e.low,
            high: e.high,
            lower_is_better: !e.higher_is_better,
            count: cum.totals.0.get(i).map_or(0, |t| t.count),
            cumulative: cum.totals.0.get(i).and_then(|t| t.mean(e.decimals)),
            cumulative_interval: iv(cum.replicates.as_ref(), i, e.decimals),
            recent: recent.0.get(i).and_then(|t| t.mean(e.decimals)),
            recent_interval: iv(recent_reps.as_ref(), i, e.decimals),
        })
        .collect()
}

/// One session's figures for the page and the JSON.
#[derive(Debug, serde::Serialize)]
pub struct Card {
    name: String,
    labels: std::collections::BTreeMap<String, String>,
    metric: &'static str,
    cumulative: Option<f64>,
    cumulative_interval: Option<(f64, f64)>,
    recent: Option<f64>,
    recent_interval: Option<(f64, f64)>,
    segments: u64,
    unknown_share: f64,
    rejected_share: f64,
    /// Segments scored per second over the last [`RATE_SECS`] (from the history).
    segments_per_second: f64,
    /// Items the guards checked, and each guard's flagged share of those it decided on (%).
    guard_checked: u64,
    guard_rates: Vec<(&'static str, f64)>,
    alerts: Vec<(String, String, i64)>,
    /// Times alerts fired, since the daemon started (the newest [`super::alerting::MAX_ALERT_SPANS`]).
    alert_spans: Vec<AlertSpan>,
    /// The `below` rules' thresholds on the chart's metric: (rule, score).
    thresholds: Vec<(String, f64)>,
    points: Vec<Point>,
    /// Each declared external metric's means.
    external: Vec<ExternalFigure>,
    /// The first external metric's mean per step over the chart's range (empty without one).
    external_points: Vec<Point>,
    html: String,
}

fn card(state: &State, s: &Session, now: i64, range: ChartRange) -> Card {
    let spec = s.spec();
    let metric = Metric::ALL.into_iter().find(|m| spec.config.has(*m)).unwrap_or(Metric::Bleu);
    let (cum, recent, counts) = {
        let st = s.state();
        (st.cumulative, st.window.stats(), st.counts)
    };
    let (cum_reps, recent_reps) = s.replicates();
    let iv = |r: Option<crate::metric::resample::Replicates>| r.and_then(|r| r.interval(metric, DEFAULT_LEVEL)).map(|i| (i.low, i.high));
    let all = (counts.scored + counts.unknown + counts.rejected).max(1) as f64;
    let until = (now / range.step + 1) * range.step;
    let q = HistoryQuery { metric, from: until - range.seconds, until, step: range.step, level: DEFAULT_LEVEL };
    let pts = points(s, &q).map(|(_, p)| p).unwrap_or_default();
    let minute_end = (now / 60 + 1) * 60;
    let last_minutes = HistoryQuery { metric, from: minute_end - RATE_SECS, until: minute_end, step: 60, level: DEFAULT_LEVEL };
    let alerts: Vec<(String, String, i64)> = state.alerts().of(&spec.name).into_iter().map(|a| (a.rule, a.state, a.since_unix)).collect();
    let thresholds = state.alerts().thresholds_of(&spec.name).into_iter().filter(|t| t.metric == metric).map(|t| (t.rule, t.value)).collect();
    let recent_segments: u64 = points(s, &last_minutes).map(|(_, p)| p.iter().map(|p| p.segments).sum()).unwrap_or(0);
    let guards = counts.guards;
    let guard_rates = if guards.checked == 0 { Vec::new() } else { crate::guard::Guard::ALL.into_iter().filter_map(|g| Some((g.name(), 100.0 * guards.rate(g)?))).collect() };
    let mut c = Card {
        name: spec.name.clone(),
        labels: spec.labels.clone(),
        metric: metric.title(),
        cumulative: (cum.segments > 0).then(|| corpus_score(&cum, &spec.config, metric)).flatten(),
        cumulative_interval: iv(cum_reps),
        recent: (recent.segments > 0).then(|| corpus_score(&recent, &spec.config, metric)).flatten(),
        recent_interval: iv(recent_reps),
        segments: counts.scored,
        unknown_share: counts.unknown as f64 / all,
        rejected_share: counts.rejected as f64 / all,
        segments_per_second: recent_segments as f64 / RATE_SECS as f64,
        guard_checked: guards.checked,
        guard_rates,
        alerts,
        alert_spans: state.alerts().spans_of(&spec.name),
        thresholds,
        points: pts,
        external: external_figures(s),
        external_points: if spec.external.is_empty() { Vec::new() } else { external_points(s, 0, q.from, q.until, q.step).map(|(_, p)| p).unwrap_or_default() },
        html: String::new(),
    };
    c.html = card_html(&c, &q, range);
    c
}

fn card_html(c: &Card, q: &HistoryQuery, range: ChartRange) -> String {
    let mut h = String::new();
    let labels: String = c.labels.iter().map(|(k, v)| format!("<span class=\"tag\">{}={}</span>", esc(k), esc(v))).collect();
    let alerts: String = if c.alerts.is_empty() {
        "<span class=\"quiet\">no alert rules</span>".into()
    } else {
        c.alerts.iter().map(|(rule, st, _)| format!("<span class=\"alert {}\" data-rule=\"{}\">{}: {}</span>", esc(st), esc(rule), esc(rule), esc(st))).collect()
    };
    let external = external_html(c, q, range);
    let guards = if c.guard_checked == 0 {
        String::new()
    } else {
        let rates: String = c.guard_rates.iter().map(|(g, r)| format!("<span class=\"guard{}\" data-guard=\"{g}\">{g} {r:.1}%</span>", if *r > 0.0 { " hit" } else { "" })).collect();
        format!("<div class=\"guards\"><span class=\"quiet\">guards, share flagged of {} checked:</span> {rates}</div>", c.guard_checked)
    };
    let marks = Marks { spans: &c.alert_spans, thresholds: &c.thresholds };
    let _ = write!(
        h,
        "<section class=\"card\" data-session=\"{name}\"><header><h2>{name}</h2>{labels}</header>\
<dl><dt>{m} since start</dt><dd class=\"cum\">{cum}</dd><dt>{m} recent window</dt><dd class=\"recent\">{rec}</dd>\
<dt>segments</dt><dd class=\"segs\">{segs}</dd><dt>segments/s (5 min)</dt><dd class=\"rate\">{rate:.2}</dd><dt>unknown</dt><dd>{unk:.1}%</dd><dt>rejected</dt><dd>{rej:.1}%</dd></dl>\
{guards}<div class=\"alerts\">{alerts}</div>{chart}{external}</section>",
        name = esc(&c.name),
        m = c.metric,
        cum = score_text(c.cumulative, c.cumulative_interval),
        rec = score_text(c.recent, c.recent_interval),
        segs = c.segments,
        rate = c.segments_per_second,
        unk = 100.0 * c.unknown_share,
        rej = 100.0 * c.rejected_share,
        // A session that has scored no segment but counts external values (values only)
        // shows their chart alone.
        chart = if c.segments == 0 && !c.external.is_empty() && c.points.iter().all(|p| p.segments == 0) { String::new() } else { chart_svg(&c.name, c.metric, &c.points, &marks, &Frame {
            from: q.from,
            until: q.until,
            step: q.step,
            left: format!("\u{2212}{}", range.key),
            right: format!("now (UTC, {} steps)", step_words(q.step)),
            what: format!("per {}, {}", step_words(q.step), range.words()),
            placement: "",
            bounds: SCORE_BOUNDS,
            counted: "segments",
        }) },
    );
    h
}

/// A card's external metrics: a row per metric (mean since start and over the recent window,
/// with intervals, and the values counted) and a small chart of the first one's mean per step.
fn external_html(c: &Card, q: &HistoryQuery, range: ChartRange) -> String {
    let Some(first) = c.external.first() else { return String::new() };
    let rows: String = c
        .external
        .iter()
        .map(|e| {
            let places = places_for(e.low, e.high);
            format!(
                "<tr data-metric=\"{n}\"><th>{n} <span class=\"quiet\">({}\u{2013}{}, {})</span></th><td class=\"ext-cum\">{}</td><td class=\"ext-recent\">{}</td><td class=\"ext-count\">{}</td></tr>",
                e.low,
                e.high,
                if e.lower_is_better { "lower is better" } else { "higher is better" },
                mean_text(e.cumulative, e.cumulative_interval, places),
                mean_text(e.recent, e.recent_interval, places),
                e.count,
                n = esc(&e.name),
            )
        })
        .collect();
    let chart = chart_svg(&c.name, &first.name, &c.external_points, &Marks::default(), &Frame {
        from: q.from,
        until: q.until,
        step: q.step,
        left: format!("\u{2212}{}", range.key),
        right: format!("{} mean per {}", first.name, step_words(q.step)),
        what: format!("mean per {}, {}", step_words(q.step), range.words()),
        placement: "",
        bounds: (first.low, first.high),
        counted: "values",
    });
    format!("<table class=\"ext\"><tr><th>external metric</th><th>mean since start</th><th>recent window</th><th>values</th></tr>{rows}</table><div class=\"ext-chart\">{chart}</div>")
}

/// What a chart marks besides the scores: times alerts fired (shaded spans) and the
/// thresholds of `below` rules (dashed lines).
#[derive(Default)]
pub struct Marks<'a> {
    /// Spans of firing; an open one lasts to the chart's right edge.
    pub spans: &'a [AlertSpan],
    /// (rule, score) of each threshold.
    pub thresholds: &'a [(String, f64)],
}

/// Where and over what time a chart is drawn.
pub struct Frame {
    /// The first step's start and the end of the last (seconds since the Unix epoch).
    pub from: i64,
    /// See `from`.
    pub until: i64,
    /// Seconds per step.
    pub step: i64,
    /// The time axis' left and right labels.
    pub left: String,
    /// See `left`.
    pub right: String,
    /// The time span in words, for the chart's accessible label.
    pub what: String,
    /// Attributes placing the chart inside another SVG (x, y, width, height), or "".
    pub placement: &'static str,
    /// The range a value can take ([`SCORE_BOUNDS`] for a score, the declared low..high for
    /// an external metric): the y scale follows the data, padded, but not beyond it.
    pub bounds: (f64, f64),
    /// What a step counts ("segments", or "values" of an external metric).
    pub counted: &'static str,
}

/// The range of a score (0-100).
pub const SCORE_BOUNDS: (f64, f64) = (0.0, 100.0);

/// A chart on its own, for a file: title, axis captions with units, the chart, and a footer
/// (`footer` lines: configuration, reference set, the proxy note).
pub fn report_svg(session: &str, metric: &str, pts: &[Point], frame: &Frame, footer: &[String]) -> String {
    // Footer lines wrapped to the width (10px sans-serif: about 6 units a character).
    let lines: Vec<String> = footer.iter().flat_map(|l| wrap(l, 105)).collect();
    let (w, h) = (CHART_W + 40.0, CHART_H + 76.0 + 14.0 * lines.len() as f64);
    let mut s = String::new();
    let _ = write!(s, "<?xml version=\"1.0\" encoding=\"UTF-8\"?>\n<svg xmlns=\"http://www.w3.org/2000/svg\" width=\"{w}\" height=\"{h}\" viewBox=\"0 0 {w} {h}\">");
    let _ = write!(s, "<title>{} of {}, {}</title><style>{CHART_CSS}.title{{font:600 14px sans-serif;fill:#23201c}}.caption,.foot{{font:10px sans-serif;fill:#6b6457}}</style>", esc(metric), esc(session), esc(&frame.what));
    let _ = write!(s, "<rect width=\"{w}\" height=\"{h}\" fill=\"#fffdf8\"/><text class=\"title\" x=\"20\" y=\"22\">{} of session {}</text><text class=\"caption\" x=\"20\" y=\"38\">{}</text>", esc(metric), esc(session), esc(&frame.what));
    let _ = write!(s, "<text class=\"caption\" transform=\"translate(14,{:.1}) rotate(-90)\" text-anchor=\"middle\">{} ({}\u{2013}{})</text>", TOP + CHART_H / 2.0, esc(metric), frame.bounds.0, frame.bounds.1);
    let band = if frame.counted == "segments" { "95% bootstrap interval" } else { "95% interval of the mean (Student t)" };
    let _ = write!(s, "<text class=\"caption\" x=\"{:.1}\" y=\"{:.1}\" text-anchor=\"middle\">time (UTC), one point per {} with {}; band: {band}</text>", 20.0 + CHART_W / 2.0, TOP + CHART_H + 14.0, step_words(frame.step), frame.counted);
    let inner = Frame { placement: "x=\"20\" y=\"50\" width=\"640\" height=\"180\" ", from: frame.from, until: frame.until, step: frame.step, left: frame.left.clone(), right: frame.right.clone(), what: frame.what.clone(), bounds: frame.bounds, counted: frame.counted };
    s.push_str(&chart_svg(session, metric, pts, &Marks::default(), &inner));
    for (i, line) in lines.iter().enumerate() {
        let _ = write!(s, "<text class=\"foot\" x=\"20\" y=\"{:.1}\">{}</text>", TOP + CHART_H + 32.0 + 14.0 * i as f64, esc(line));
    }
    s.push_str("</svg>\n");
    s
}

/// Where a report's chart starts (below the title and its caption).
const TOP: f64 = 50.0;

/// `text` in lines of at most `width` characters, broken at spaces (a longer word stays whole).
fn wrap(text: &str, width: usize) -> Vec<String> {
    let mut out: Vec<String> = Vec::new();
    for word in text.split(' ') {
        match out.last_mut() {
            Some(l) if l.chars().count() + 1 + word.chars().count() <= width => {
                l.push(' ');
                l.push_str(word);
            }
            _ => out.push(word.to_owned()),
        }
    }
    out
}

/// "minute", "5 minutes", "hour", "6 hours", ...
pub fn step_words(step: i64) -> String {
    match step {
        60 => "minute".into(),
        3600 => "hour".into(),
        s if s % 3600 == 0 => format!("{} hours", s / 3600),
        s => format!("{} minutes", s / 60),
    }
}

/// The chart of one session: the score of each step with segments (a point and a line), its
/// interval as a band, a shaded span for each time an alert fired, and a dashed line for each
/// threshold.
pub fn chart_svg(session: &str, metric: &str, pts: &[Point], marks: &Marks<'_>, frame: &Frame) -> String {
    let Frame { from, until, step, .. } = *frame;
    let with: Vec<&Point> = pts.iter().filter(|p| p.score.is_some()).collect();
    let (mut lo, mut hi) = (f64::MAX, f64::MIN);
    for p in &with {
        let s = p.score.unwrap_or(0.0);
        let (l, h) = p.interval.map_or((s, s), |i| (i.low, i.high));
        lo = lo.min(l);
        hi = hi.max(h);
    }
    if with.is_empty() {
        (lo, hi) = frame.bounds;
    }
    for (_, t) in marks.thresholds {
        lo = lo.min(*t);
        hi = hi.max(*t);
    }
    // A tenth of the data's range on each side, at least a hundredth of the bounds (1 for scores).
    let (low, high) = frame.bounds;
    let pad = ((hi - lo) * 0.1).max((high - low) / 100.0);
    let (lo, hi) = ((lo - pad).max(low), (hi + pad).min(high));
    let tick_places = if hi - lo >= 1.0 { 1 } else { 3 };
    let x = |t: i64| PAD_L + (t - from) as f64 / (until - from).max(1) as f64 * (CHART_W - PAD_L - 8.0);
    let y = |v: f64| PAD_T + (hi - v) / (hi - lo).max(1e-9) * (CHART_H - PAD_T - PAD_B);
    let mid = |p: &Point| p.start + step / 2;
    let mut s = String::new();
    let _ = write!(s, "<svg class=\"chart\" {}viewBox=\"0 0 {CHART_W} {CHART_H}\" role=\"img\" aria-label=\"{} of {}, {}\" xmlns=\"http://www.w3.org/2000/svg\">", frame.placement, esc(metric), esc(session), esc(&frame.what));
    let _ = write!(s, "<rect class=\"plot\" x=\"{PAD_L}\" y=\"{PAD_T}\" width=\"{}\" height=\"{}\"/>", CHART_W - PAD_L - 8.0, CHART_H - PAD_T - PAD_B);
    for span in marks.spans.iter().filter(|sp| sp.from < until && sp.until.is_none_or(|u| u > from)) {
        let (x0, x1) = (x(span.from.max(from)), x(span.until.unwrap_or(until).min(until)));
        let (state, to) = match span.until {
            Some(u) => ("resolved", format!("resolved {}", clock(u))),
            None => ("firing", "firing now".to_owned()),
        };
        let _ = write!(
            s,
            "<rect class=\"alert-span\" data-rule=\"{}\" data-state=\"{state}\" x=\"{x0:.1}\" y=\"{PAD_T}\" width=\"{:.1}\" height=\"{}\"><title>{}: fired {}, {to}</title></rect>",
            esc(&span.rule),
            (x1 - x0).max(1.0),
            CHART_H - PAD_T - PAD_B,
            esc(&span.rule),
            clock(span.from)
        );
    }
    // The band: runs of consecutive steps that have an interval.
    let mut runs: Vec<Vec<&Point>> = Vec::new();
    for p in &with {
        match (p.interval, runs.last_mut()) {
            (Some(_), Some(run)) if run.last().is_some_and(|q| q.start + step == p.start) => run.push(p),
            (Some(_), _) => runs.push(vec![p]),
            (None, _) => runs.push(Vec::new()),
        }
    }
    for run in runs.iter().filter(|r| !r.is_empty()) {
        // A run of one step would be a band of no width: it spans the middle half of its step.
        let edges = |p: &Point| if run.len() == 1 { vec![p.start + step / 4, p.start + step - step / 4] } else { vec![mid(p)] };
        let upper: Vec<String> = run.iter().flat_map(|p| edges(p).into_iter().map(|t| format!("{:.1},{:.1}", x(t), y(p.interval.map_or(0.0, |i| i.high))))).collect();
        let lower: Vec<String> = run.iter().rev().flat_map(|p| edges(p).into_iter().rev().map(|t| format!("{:.1},{:.1}", x(t), y(p.interval.map_or(0.0, |i| i.low))))).collect();
        let _ = write!(s, "<polygon class=\"band\" points=\"{} {}\"/>", upper.join(" "), lower.join(" "));
    }
    let line: Vec<String> = with.iter().map(|p| format!("{:.1},{:.1}", x(mid(p)), y(p.score.unwrap_or(0.0)))).collect();
    let _ = write!(s, "<polyline class=\"line\" points=\"{}\"/>", line.join(" "));
    for p in &with {
        let _ = write!(s, "<circle class=\"pt\" data-start=\"{}\" data-segments=\"{}\" cx=\"{:.1}\" cy=\"{:.1}\" r=\"2.5\"><title>{:.2} ({} {})</title></circle>", p.start, p.segments, x(mid(p)), y(p.score.unwrap_or(0.0)), p.score.unwrap_or(0.0), p.segments, frame.counted);
    }
    for (rule, t) in marks.thresholds {
        let _ = write!(
            s,
            "<line class=\"threshold\" data-rule=\"{r}\" data-value=\"{t}\" x1=\"{PAD_L}\" x2=\"{:.1}\" y1=\"{y:.1}\" y2=\"{y:.1}\"><title>{r}: alert when the interval lies below {t}</title></line><text class=\"tick threshold-label\" x=\"{:.1}\" y=\"{:.1}\">{r} {t}</text>",
            CHART_W - 8.0,
            CHART_W - 10.0,
            y(*t) - 3.0,
            r = esc(rule),
            y = y(*t)
        );
    }
    for v in [lo, (lo + hi) / 2.0, hi] {
        let _ = write!(s, "<text class=\"tick\" x=\"{:.1}\" y=\"{:.1}\">{v:.tick_places$}</text>", PAD_L - 4.0, y(v) + 3.0);
    }
    let _ = write!(s, "<text class=\"axis\" x=\"{PAD_L}\" y=\"{}\">{}</text><text class=\"axis end\" x=\"{}\" y=\"{}\">{}</text>", CHART_H - 6.0, esc(&frame.left), CHART_W - 8.0, CHART_H - 6.0, esc(&frame.right));
    s.push_str("</svg>");
    s
}

/// `unix` as hh:mm UTC.
fn clock(unix: i64) -> String {
    let d = unix.rem_euclid(86_400);
    format!("{:02}:{:02} UTC", d / 3600, d % 3600 / 60)
}

/// Every session's card, at `now`, charting `range`.
pub fn overview(state: &State, now: i64, range: ChartRange) -> Vec<Card> {
    state.sessions().iter().map(|s| card(state, s, now, range)).collect()
}

/// The JSON of `GET /api/v1/overview[?range=R]`.
pub fn overview_json(state: &State, query: &str) -> String {
    let now = unix_now();
    let range = ChartRange::from_query(query);
    serde_json::json!({ "unix_time": now, "refresh_seconds": REFRESH_SECS, "range": range.key, "sessions": overview(state, now, range) }).to_string()
}

/// The first two sessions (in name order) that can be compared: the same reference-set
/// version and configuration.
fn default_pair(state: &State) -> Option<(String, String)> {
    let all = state.sessions();
    all.iter().enumerate().find_map(|(i, a)| {
        all[i + 1..].iter().find(|b| b.refs().digest() == a.refs().digest() && b.spec().config == a.spec().config).map(|b| (a.spec().name.clone(), b.spec().name.clone()))
    })
}

/// The comparison of session `a` with `b` over the segments both recent windows hold, as HTML
/// (a table row per metric: A, B, A - B with its paired interval, p) and as JSON.
pub fn comparison(state: &State, a: &str, b: &str) -> (String, serde_json::Value) {
    let fail = |m: String| (format!("<p class=\"quiet\">{}</p>", esc(&m)), serde_json::json!({ "a": a, "b": b, "error": m }));
    let (sa, sb) = match (state.session(a), state.session(b)) {
        (Ok(x), Ok(y)) => (x, y),
        (Err(e), _) | (_, Err(e)) => return fail(e.to_string()),
    };
    let r = sa.spec().resampling;
    let settings = crate::metric::compare::CompareSettings { resamples: r.resamples, seed: r.seed, level: DEFAULT_LEVEL, trials: PAGE_COMPARE_TRIALS };
    let p = match super::compare::paired(&sa, &sb, &settings, 1) {
        Ok(p) => p,
        Err(e) => return fail(e.to_string()),
    };
    if p.comparison.segments == 0 {
        return fail(format!("sessions {a} and {b} hold no segment in common in their recent windows ({} and {} segments)", p.recent_a, p.recent_b));
    }
    let rows: String = p
        .comparison
        .metrics
        .iter()
        .map(|m| {
            let iv = m.interval.map_or_else(String::new, |i| format!(" <span class=\"iv\">[{:+.2}, {:+.2}]</span>", i.low, i.high));
            let verdict = match m.interval {
                Some(i) if i.high < 0.0 => "<span class=\"worse\">A worse</span>",
                Some(i) if i.low > 0.0 => "<span class=\"better\">A better</span>",
                Some(_) => "<span class=\"quiet\">no clear difference</span>",
                None => "",
            };
            let pv = m.p_value.map_or_else(|| "&ndash;".to_owned(), |p| format!("{p:.4}"));
            format!("<tr data-metric=\"{}\"><td>{}</td><td>{:.2}</td><td>{:.2}</td><td class=\"diff\" data-difference=\"{}\">{:+.2}{iv}</td><td>{pv}</td><td>{verdict}</td></tr>", m.metric.name(), m.metric.title(), m.a.score, m.b.score, m.difference, m.difference)
        })
        .collect();
    let html = format!(
        "<table class=\"cmp\"><thead><tr><th></th><th>A: {}</th><th>B: {}</th><th>A &minus; B, 95% paired interval</th><th>p</th><th></th></tr></thead><tbody>{rows}</tbody></table>\
<p class=\"quiet\">{} segments in both recent windows (A holds {}, B {}); paired bootstrap of {} replicates, p from {} randomization trials.</p>",
        esc(a),
        esc(b),
        p.comparison.segments,
        p.recent_a,
        p.recent_b,
        settings.resamples,
        settings.trials
    );
    let json = serde_json::json!({ "a": a, "b": b, "segments": p.comparison.segments, "metrics": p.comparison.metrics.iter().map(|m| (m.metric.name(), m)).collect::<std::collections::BTreeMap<_, _>>() });
    (html, json)
}

/// The JSON of `GET /api/v1/compare?a=NAME&b=NAME`: the comparison's numbers and its HTML.
pub fn comparison_json(state: &State, query: &str) -> String {
    let (mut a, mut b) = (String::new(), String::new());
    for (k, v) in query.split('&').filter_map(|kv| kv.split_once('=')) {
        match k {
            "a" => a = percent_decode(v),
            "b" => b = percent_decode(v),
            _ => {}
        }
    }
    let (html, mut json) = comparison(state, &a, &b);
    json["html"] = serde_json::Value::String(html);
    json.to_string()
}

/// A query-string value decoded (`+` is a space; a bad escape stays as it is).
fn percent_decode(v: &str) -> String {
    let bytes = v.as_bytes();
    let mut out = Vec::with_capacity(bytes.len());
    let mut i = 0;
    while i < bytes.len() {
        let hex = bytes.get(i + 1..i + 3).and_then(|h| std::str::from_utf8(h).ok()).and_then(|h| u8::from_str_radix(h, 16).ok());
        match (bytes[i], hex) {
            (b'+', _) => out.push(b' '),
            (b'%', Some(x)) => {
                out.push(x);
                i += 2;
            }
            (c, _) => out.push(c),
        }
        i += 1;
    }
    String::from_utf8_lossy(&out).into_owned()
}

/// The comparison section: two choosers and the default pair's comparison.
fn compare_section(state: &State) -> String {
    let names: Vec<String> = state.sessions().iter().map(|s| s.spec().name.clone()).collect();
    let pair = default_pair(state);
    let options = |chosen: Option<&str>| -> String { names.iter().map(|n| format!("<option{}>{}</option>", if Some(n.as_str()) == chosen { " selected" } else { "" }, esc(n))).collect() };
    let (a, b) = pair.as_ref().map_or((None, None), |(a, b)| (Some(a.as_str()), Some(b.as_str())));
    let body = match &pair {
        Some((a, b)) => comparison(state, a, b).0,
        None => "<p class=\"quiet\">No two sessions score against the same reference set with the same configuration.</p>".to_owned(),
    };
    format!(
        "<section class=\"card\" id=\"compare\"><header><h2>Compare two sessions</h2><span class=\"quiet\">A <select id=\"cmp-a\">{}</select> against B <select id=\"cmp-b\">{}</select></span></header><div id=\"cmp-result\">{body}</div></section>",
        options(a),
        options(b)
    )
}

/// The page of `GET /[?range=R]`.
pub fn page_html(state: &State, query: &str) -> String {
    let range = ChartRange::from_query(query);
    let cards: String = overview(state, unix_now(), range).iter().map(|c| c.html.as_str()).collect();
    let ranges: String = CHART_RANGES.iter().map(|r| format!("<a href=\"?range={k}\"{}>{k}</a>", if *r == range { " class=\"on\"" } else { "" }, k = r.key)).collect();
    format!(
        "<!doctype html><html lang=\"en\"><head><meta charset=\"utf-8\"><title>mtgauge</title><style>{CSS}{CHART_CSS}</style></head>\
<body><div class=\"top\"><h1>mtgauge</h1><nav class=\"ranges\">charts over {ranges}</nav><span id=\"stamp\">sessions as served</span></div>\
<main id=\"cards\">{cards}</main><div class=\"below\">{compare}</div>\
<p class=\"note\">Scores are an automatic proxy for translation quality, comparable only between sessions with the same tokenizer, references and configuration.</p>\
<script>const EVERY={every},RANGE='{range}';{SCRIPT}</script></body></html>",
        range = range.key,
        compare = compare_section(state),
        every = REFRESH_SECS * 1000
    )
}

const CSS: &str = "body{margin:0;font:14px/1.4 system-ui,sans-serif;background:#f4f1ea;color:#23201c}\
.top{display:flex;align-items:baseline;gap:1em;padding:.6em 1.2em;background:#2e4a3f;color:#f4f1ea}\
.top h1{font-size:18px;margin:0;letter-spacing:.08em}.ranges{font-size:13px}.ranges a{color:#cfe0d6;margin:0 .25em}.ranges a.on{color:#fff;font-weight:700;text-decoration:none}#cards{display:grid;grid-template-columns:repeat(auto-fill,minmax(660px,1fr));gap:1em;padding:1em}\
.card{background:#fffdf8;border:1px solid #d9d2c3;border-radius:6px;padding:.6em .9em}.card header{display:flex;gap:.5em;align-items:baseline;flex-wrap:wrap}\
.card h2{font-size:16px;margin:0 .4em 0 0}.tag{font-size:12px;background:#e8e1d0;border-radius:3px;padding:0 .4em}\
dl{display:grid;grid-template-columns:repeat(6,auto);gap:0 1em;margin:.5em 0}dt{font-size:11px;color:#6b6457;grid-row:1}dd{margin:0;font-weight:600;grid-row:2}\
.iv{font-weight:400;color:#6b6457}.alerts{margin:.3em 0}.alert{font-size:12px;border-radius:3px;padding:0 .4em;margin-right:.4em;background:#e8e1d0}\
.alert.firing{background:#b8412c;color:#fff}.alert.pending{background:#d9a441}.quiet{font-size:12px;color:#8a8273}\
.chart{width:100%;height:auto}.ext{font-size:12px;border-collapse:collapse;margin:.3em 0}.ext th,.ext td{padding:0 1em 0 0;text-align:left}.ext td{font-weight:600}.ext-chart .chart{width:60%}.guards{font-size:12px;margin:.2em 0}.guard{margin-right:.6em}.guard.hit{color:#b8412c;font-weight:600}\
.below{padding:0 1em}#compare select{font:inherit}.cmp{border-collapse:collapse;margin:.5em 0}.cmp th,.cmp td{padding:.15em .8em;text-align:left;border-bottom:1px solid #e8e1d0}\
.worse{color:#b8412c;font-weight:600}.better{color:#2e4a3f;font-weight:600}.note{padding:0 1.2em;font-size:12px;color:#6b6457}";
/// The styles of a chart (the page's, and a report file's own copy).
pub const CHART_CSS: &str = ".plot{fill:#fbf8f1;stroke:#d9d2c3}.band{fill:#7fa391;fill-opacity:.35}.line{fill:none;stroke:#2e4a3f;stroke-width:1.6}\
.pt{fill:#2e4a3f}.alert-span{fill:#b8412c;fill-opacity:.15}.alert-span[data-state=resolved]{fill-opacity:.08}\
.threshold{stroke:#b8412c;stroke-width:1;stroke-dasharray:4 3}.threshold-label{fill:#b8412c}.tick,.axis{font-size:10px;fill:#6b6457;font-family:sans-serif}.tick{text-anchor:end}.axis.end{text-anchor:end}";

const SCRIPT: &str = "async function refresh(){try{const r=await fetch('api/v1/overview?range='+RANGE,{cache:'no-store'});if(!r.ok)return;const d=await r.json();\
document.getElementById('cards').innerHTML=d.sessions.map(s=>s.html).join('');\
document.getElementById('stamp').textContent='updated '+new Date(d.unix_time*1000).toISOString().slice(11,19)+' UTC';await compare();}catch(e){}}\
async function compare(){const a=document.getElementById('cmp-a'),b=document.getElementById('cmp-b');if(!a||!b||!a.value||!b.value)return;\
const r=await fetch('api/v1/compare?a='+encodeURIComponent(a.value)+'&b='+encodeURIComponent(b.value),{cache:'no-store'});if(!r.ok)return;\
document.getElementById('cmp-result').innerHTML=(await r.json()).html;}\
for(const id of ['cmp-a','cmp-b']){const e=document.getElementById(id);if(e)e.addEventListener('change',()=>compare().catch(()=>{}));}\
setInterval(refresh,EVERY);";

#[cfg(test)]
mod tests {
    use super::*;
    use crate::metric::resample::{Interval, METHOD};

    /// The numbers of the y axis' ticks of the first chart in `html`.
    fn ticks(html: &str) -> Vec<f64> {
        html.split("<text class=\"tick\"").skip(1).take(3).map(|t| t.split('>').nth(1).unwrap().split('<').next().unwrap().parse().unwrap()).collect()
    }

    /// A card of a session with external metrics lists each one's mean since start (the mean
    /// of the values sent, recomputed here) and charts the first one's mean per minute on a
    /// scale that follows the data inside the declared 0..1, not a score's 0..100.
    #[test]
    fn a_card_lists_external_means_and_charts_the_first_in_its_units() {
        use crate::external::{Declaration, ExternalSpec};
        use crate::refs::{RefSet, SegmentInput};
        let state = State::new(None, crate::server::Limits::default()).unwrap();
        let set = RefSet::new(vec![SegmentInput { id: "1".into(), source: None, refs: vec!["Die Fähre nach Tarnholm fährt um neun Uhr ab.".into()] }]).unwrap();
        state.insert_refset("ferry", set, false).unwrap();
        let mut spec = state.session_spec("ferry-v8", "ferry", Default::default(), Default::default(), 0, Default::default()).unwrap();
        spec.external = Declaration::new(vec![ExternalSpec::new("qe", 0.0, 1.0).unwrap(), ExternalSpec::new("edit_rate", 0.0, 100.0).unwrap()]).unwrap();
        let (session, _) = state.create_session(spec, false).unwrap();
        let now = unix_now();
        let values = [0.41, 0.47, 0.52, 0.60];
        for (k, v) in values.iter().enumerate() {
            let items = vec![(k as u64, session.spec().external.check_item([("qe", *v)]).unwrap())];
            let d = session.external_delta(&items).unwrap();
            session.apply_external(&d).unwrap();
            session.record_external(now, &d.totals).unwrap();
        }
        let c = card(&state, &session, now, CHART_RANGES[0]);
        let mean = values.iter().sum::<f64>() / values.len() as f64;
        let row = c.html.split("<tr data-metric=\"qe\">").nth(1).expect("a row for qe");
        assert!(row.contains(&format!("<td class=\"ext-cum\">{mean:.3}")), "{row}");
        assert!(row.contains("<td class=\"ext-count\">4</td>"), "{row}");
        assert!(c.html.contains("<tr data-metric=\"edit_rate\">"));
        let chart = c.html.split("class=\"ext-chart\"").nth(1).expect("the external chart");
        assert_eq!(chart.matches("class=\"pt\"").count(), 1, "one minute with values");
        let t = ticks(chart);
        assert!(t.iter().all(|v| (0.0..=1.0).contains(v)) && t[2] - t[0] < 1.0, "{t:?}");
        assert!(t[0] < 0.41 && t[2] > 0.60, "{t:?}");
        // No segment scored: the card draws the external chart alone (no empty score chart).
        assert_eq!(c.html.matches("<svg class=\"chart\"").count(), 1, "{}", c.html);
    }

    fn point(start: i64, interval: bool) -> Point {
        Point { start, segments: 10, score: Some(40.0), interval: interval.then_some(Interval { level: 0.95, low: 35.0, high: 45.0, resamples: 200, method: METHOD, seed: 1 }), unknown: 0, rejected: 0 }
    }

    /// The x coordinates of each band polygon in `svg`.
    fn band_xs(svg: &str) -> Vec<Vec<f64>> {
        svg.split("<polygon class=\"band\" points=\"").skip(1).map(|rest| rest.split('"').next().unwrap_or("").split(' ').filter_map(|xy| xy.split(',').next()?.parse().ok()).collect()).collect()
    }

    #[test]
    fn a_lone_step_with_an_interval_gets_a_band_of_some_width() {
        let frame = Frame { from: 0, until: 600, step: 60, left: String::new(), right: String::new(), what: String::new(), placement: "", bounds: SCORE_BOUNDS, counted: "segments" };
        // Steps 0-1 with intervals (one run), step 2 without, step 4 alone with one.
        let pts = [point(0, true), point(60, true), point(120, false), point(240, true)];
        let bands = band_xs(&chart_svg("s", "BLEU", &pts, &Marks::default(), &frame));
        assert_eq!(bands.len(), 2, "{bands:?}");
        let width = |xs: &[f64]| xs.iter().copied().fold(f64::MIN, f64::max) - xs.iter().copied().fold(f64::MAX, f64::min);
        assert!(width(&bands[0]) > 0.0 && width(&bands[1]) > 0.0, "{bands:?}");
        // The lone step's band spans the middle half of its step: half the run's width (one step).
        assert!((width(&bands[1]) - width(&bands[0]) / 2.0).abs() < 0.2, "{bands:?}");
    }

    /// The value of attribute `name` in each element of `svg` with class `class`.
    fn attr_of(svg: &str, class: &str, name: &str) -> Vec<String> {
        svg.split(&format!("class=\"{class}\"")).skip(1).map(|rest| rest.split(&format!("{name}=\"")).nth(1).and_then(|v| v.split('"').next()).unwrap_or("").to_owned()).collect()
    }

    #[test]
    fn spans_and_thresholds_are_drawn_where_they_belong() {
        let frame = Frame { from: 0, until: 600, step: 60, left: String::new(), right: String::new(), what: String::new(), placement: "", bounds: SCORE_BOUNDS, counted: "segments" };
        let pts = [point(0, true), point(60, true), point(300, true)];
        let spans = [
            // Before the chart: not drawn.
            AlertSpan { rule: "old".into(), from: -900, until: Some(-300) },
            // Resolved inside it, from its left edge.
            AlertSpan { rule: "floor".into(), from: -60, until: Some(120) },
            // Firing now: to the right edge.
            AlertSpan { rule: "floor".into(), from: 300, until: None },
        ];
        // A threshold far under the scores widens the scale to show it.
        let thresholds = [("floor".to_owned(), 20.0)];
        let svg = chart_svg("s", "BLEU", &pts, &Marks { spans: &spans, thresholds: &thresholds }, &frame);
        let xs: Vec<f64> = attr_of(&svg, "alert-span", "x").iter().map(|v| v.parse().unwrap()).collect();
        let ws: Vec<f64> = attr_of(&svg, "alert-span", "width").iter().map(|v| v.parse().unwrap()).collect();
        assert_eq!(attr_of(&svg, "alert-span", "data-state"), ["resolved", "firing"], "{svg}");
        let plot_w = CHART_W - PAD_L - 8.0;
        assert!((xs[0] - PAD_L).abs() < 0.1 && (ws[0] - plot_w * 120.0 / 600.0).abs() < 0.2, "{xs:?} {ws:?}");
        assert!((xs[1] - (PAD_L + plot_w / 2.0)).abs() < 0.1 && (xs[1] + ws[1] - (PAD_L + plot_w)).abs() < 0.2, "{xs:?} {ws:?}");
        let ys: Vec<f64> = attr_of(&svg, "threshold", "y1").iter().map(|v| v.parse().unwrap()).collect();
        assert_eq!(ys.len(), 1, "{svg}");
        // Inside the plot, below every point (larger y).
        let point_ys: Vec<f64> = attr_of(&svg, "pt", "cy").iter().map(|v| v.parse().unwrap()).collect();
        assert!(ys[0] <= CHART_H - PAD_B && point_ys.iter().all(|p| *p < ys[0]), "{ys:?} {point_ys:?}");
    }

    #[test]
    fn query_values_are_decoded() {
        assert_eq!(percent_decode("ferry-v8%2Bcanary+x"), "ferry-v8+canary x");
        assert_eq!(percent_decode("%e2%88%92"), "\u{2212}");
        // A bad or cut escape stays as it is.
        assert_eq!(percent_decode("a%zz%4"), "a%zz%4");
    }
}
