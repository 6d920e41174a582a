//! The status page on the metrics/admin listener: `GET /` is an HTML page of every session
//! (labels, cumulative and recent scores with intervals, counts, unknown and rejected shares,
//! alert states) with a chart per session of its score over the last hour from the history,
//! and `GET /api/v1/overview` the same as JSON, which the page fetches to refresh its cards in
//! place.
//!
//! Charts are SVG drawn here, on the server, from the history's steps: no JavaScript library,
//! nothing fetched from elsewhere, and the first response is already complete (a page opened
//! without scripts, or saved with an incident, shows the charts).

use std::fmt::Write as _;

use crate::metric::resample::DEFAULT_LEVEL;
use crate::metric::scores::corpus_score;
use crate::metric::Metric;

use super::history::{points, HistoryQuery, Point};
use super::state::{unix_now, State};
use crate::session::Session;

/// Steps of a session's chart.
pub const CHART_STEPS: i64 = 60;
/// Seconds per chart step.
pub const CHART_STEP_SECS: i64 = 60;
/// Seconds between refreshes of the page.
pub const REFRESH_SECS: u32 = 5;
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
    alerts: Vec<(String, String, i64)>,
    points: Vec<Point>,
    html: String,
}

fn card(state: &State, s: &Session, now: i64) -> Card {
    let spec = s.spec();
    let metric = Metric::ALL.into_iter().find(|m| spec.config.has(*m)).unwrap_or(Metric::Bleu);
    let (cum, recent, counts) = {
        let st = s.state();
        (st.cumulative, st.window.stats(), st.counts)
    };
    let (cum_reps, recent_reps) = s.replicates();
    let iv = |r: Option<crate::metric::resample::Replicates>| r.and_then(|r| r.interval(metric, DEFAULT_LEVEL)).map(|i| (i.low, i.high));
    let all = (counts.scored + counts.unknown + counts.rejected).max(1) as f64;
    let until = (now / CHART_STEP_SECS + 1) * CHART_STEP_SECS;
    let q = HistoryQuery { metric, from: until - CHART_STEPS * CHART_STEP_SECS, until, step: CHART_STEP_SECS, level: DEFAULT_LEVEL };
    let pts = points(s, &q).map(|(_, p)| p).unwrap_or_default();
    let alerts: Vec<(String, String, i64)> = state.alerts().of(&spec.name).into_iter().map(|a| (a.rule, a.state, a.since_unix)).collect();
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
        alerts,
        points: pts,
        html: String::new(),
    };
    c.html = card_html(&c, q.from, q.until);
    c
}

fn card_html(c: &Card, from: i64, until: i64) -> String {
    let mut h = String::new();
    let labels: String = c.labels.iter().map(|(k, v)| format!("<span class=\"tag\">{}={}</span>", esc(k), esc(v))).collect();
    let alerts: String = if c.alerts.is_empty() {
        "<span class=\"quiet\">no alert rules</span>".into()
    } else {
        c.alerts.iter().map(|(rule, st, _)| format!("<span class=\"alert {}\" data-rule=\"{}\">{}: {}</span>", esc(st), esc(rule), esc(rule), esc(st))).collect()
    };
    let _ = write!(
        h,
        "<section class=\"card\" data-session=\"{name}\"><header><h2>{name}</h2>{labels}</header>\
<dl><dt>{m} since start</dt><dd class=\"cum\">{cum}</dd><dt>{m} recent window</dt><dd class=\"recent\">{rec}</dd>\
<dt>segments</dt><dd class=\"segs\">{segs}</dd><dt>unknown</dt><dd>{unk:.1}%</dd><dt>rejected</dt><dd>{rej:.1}%</dd></dl>\
<div class=\"alerts\">{alerts}</div>{chart}</section>",
        name = esc(&c.name),
        m = c.metric,
        cum = score_text(c.cumulative, c.cumulative_interval),
        rec = score_text(c.recent, c.recent_interval),
        segs = c.segments,
        unk = 100.0 * c.unknown_share,
        rej = 100.0 * c.rejected_share,
        chart = chart_svg(&c.name, c.metric, &c.points, &c.alerts, &Frame { from, until, step: CHART_STEP_SECS, left: "\u{2212}60 min".into(), right: "now (UTC minute steps)".into(), what: "per minute, last hour".into(), placement: "" }),
    );
    h
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
}

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
    let _ = write!(s, "<text class=\"caption\" transform=\"translate(14,{:.1}) rotate(-90)\" text-anchor=\"middle\">{} (0\u{2013}100)</text>", TOP + CHART_H / 2.0, esc(metric));
    let _ = write!(s, "<text class=\"caption\" x=\"{:.1}\" y=\"{:.1}\" text-anchor=\"middle\">time (UTC), one point per {} with segments; band: 95% bootstrap interval</text>", 20.0 + CHART_W / 2.0, TOP + CHART_H + 14.0, step_words(frame.step));
    let inner = Frame { placement: "x=\"20\" y=\"50\" width=\"640\" height=\"180\" ", from: frame.from, until: frame.until, step: frame.step, left: frame.left.clone(), right: frame.right.clone(), what: frame.what.clone() };
    s.push_str(&chart_svg(session, metric, pts, &[], &inner));
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
/// interval as a band, and a shaded span for each alert that is firing (from when it fired).
pub fn chart_svg(session: &str, metric: &str, pts: &[Point], alerts: &[(String, String, i64)], frame: &Frame) -> String {
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
        (lo, hi) = (0.0, 100.0);
    }
    let pad = ((hi - lo) * 0.1).max(1.0);
    let (lo, hi) = ((lo - pad).max(0.0), (hi + pad).min(100.0));
    let x = |t: i64| PAD_L + (t - from) as f64 / (until - from).max(1) as f64 * (CHART_W - PAD_L - 8.0);
    let y = |v: f64| PAD_T + (hi - v) / (hi - lo).max(1e-9) * (CHART_H - PAD_T - PAD_B);
    let mid = |p: &Point| p.start + step / 2;
    let mut s = String::new();
    let _ = write!(s, "<svg class=\"chart\" {}viewBox=\"0 0 {CHART_W} {CHART_H}\" role=\"img\" aria-label=\"{} of {}, {}\" xmlns=\"http://www.w3.org/2000/svg\">", frame.placement, esc(metric), esc(session), esc(&frame.what));
    let _ = write!(s, "<rect class=\"plot\" x=\"{PAD_L}\" y=\"{PAD_T}\" width=\"{}\" height=\"{}\"/>", CHART_W - PAD_L - 8.0, CHART_H - PAD_T - PAD_B);
    for (_, st, since) in alerts.iter().filter(|(_, st, _)| st == "firing") {
        let x0 = x((*since).max(from));
        let _ = write!(s, "<rect class=\"alert-span\" data-state=\"{}\" x=\"{x0:.1}\" y=\"{PAD_T}\" width=\"{:.1}\" height=\"{}\"/>", esc(st), (x(until) - x0).max(1.0), CHART_H - PAD_T - PAD_B);
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
        let _ = write!(s, "<circle class=\"pt\" data-start=\"{}\" data-segments=\"{}\" cx=\"{:.1}\" cy=\"{:.1}\" r=\"2.5\"><title>{:.2} ({} segments)</title></circle>", p.start, p.segments, x(mid(p)), y(p.score.unwrap_or(0.0)), p.score.unwrap_or(0.0), p.segments);
    }
    for v in [lo, (lo + hi) / 2.0, hi] {
        let _ = write!(s, "<text class=\"tick\" x=\"{:.1}\" y=\"{:.1}\">{v:.1}</text>", PAD_L - 4.0, y(v) + 3.0);
    }
    let _ = write!(s, "<text class=\"axis\" x=\"{PAD_L}\" y=\"{}\">{}</text><text class=\"axis end\" x=\"{}\" y=\"{}\">{}</text>", CHART_H - 6.0, esc(&frame.left), CHART_W - 8.0, CHART_H - 6.0, esc(&frame.right));
    s.push_str("</svg>");
    s
}

/// Every session's card, at `now`.
pub fn overview(state: &State, now: i64) -> Vec<Card> {
    state.sessions().iter().map(|s| card(state, s, now)).collect()
}

/// The JSON of `GET /api/v1/overview`.
pub fn overview_json(state: &State) -> String {
    let now = unix_now();
    serde_json::json!({ "unix_time": now, "refresh_seconds": REFRESH_SECS, "sessions": overview(state, now) }).to_string()
}

/// The page of `GET /`.
pub fn page_html(state: &State) -> String {
    let cards: String = overview(state, unix_now()).iter().map(|c| c.html.as_str()).collect();
    format!(
        "<!doctype html><html lang=\"en\"><head><meta charset=\"utf-8\"><title>mtgauge</title><style>{CSS}{CHART_CSS}</style></head>\
<body><div class=\"top\"><h1>mtgauge</h1><span id=\"stamp\">sessions as served</span></div>\
<main id=\"cards\">{cards}</main><script>const EVERY={every};{SCRIPT}</script></body></html>",
        every = REFRESH_SECS * 1000
    )
}

const CSS: &str = "body{margin:0;font:14px/1.4 system-ui,sans-serif;background:#f4f1ea;color:#23201c}\
.top{display:flex;align-items:baseline;gap:1em;padding:.6em 1.2em;background:#2e4a3f;color:#f4f1ea}\
.top h1{font-size:18px;margin:0;letter-spacing:.08em}#cards{display:grid;grid-template-columns:repeat(auto-fill,minmax(660px,1fr));gap:1em;padding:1em}\
.card{background:#fffdf8;border:1px solid #d9d2c3;border-radius:6px;padding:.6em .9em}.card header{display:flex;gap:.5em;align-items:baseline;flex-wrap:wrap}\
.card h2{font-size:16px;margin:0 .4em 0 0}.tag{font-size:12px;background:#e8e1d0;border-radius:3px;padding:0 .4em}\
dl{display:grid;grid-template-columns:repeat(5,auto);gap:0 1em;margin:.5em 0}dt{font-size:11px;color:#6b6457;grid-row:1}dd{margin:0;font-weight:600;grid-row:2}\
.iv{font-weight:400;color:#6b6457}.alerts{margin:.3em 0}.alert{font-size:12px;border-radius:3px;padding:0 .4em;margin-right:.4em;background:#e8e1d0}\
.alert.firing{background:#b8412c;color:#fff}.alert.pending{background:#d9a441}.quiet{font-size:12px;color:#8a8273}\
.chart{width:100%;height:auto}";
/// The styles of a chart (the page's, and a report file's own copy).
pub const CHART_CSS: &str = ".plot{fill:#fbf8f1;stroke:#d9d2c3}.band{fill:#7fa391;fill-opacity:.35}.line{fill:none;stroke:#2e4a3f;stroke-width:1.6}\
.pt{fill:#2e4a3f}.alert-span{fill:#b8412c;fill-opacity:.15}.tick,.axis{font-size:10px;fill:#6b6457;font-family:sans-serif}.tick{text-anchor:end}.axis.end{text-anchor:end}";

const SCRIPT: &str = "async function refresh(){try{const r=await fetch('api/v1/overview',{cache:'no-store'});if(!r.ok)return;const d=await r.json();\
document.getElementById('cards').innerHTML=d.sessions.map(s=>s.html).join('');\
document.getElementById('stamp').textContent='updated '+new Date(d.unix_time*1000).toISOString().slice(11,19)+' UTC';}catch(e){}}\
setInterval(refresh,EVERY);";

#[cfg(test)]
mod tests {
    use super::*;
    use crate::metric::resample::{Interval, METHOD};

    fn point(start: i64, interval: bool) -> Point {
        Point { start, segments: 10, score: Some(40.0), interval: interval.then_some(Interval { level: 0.95, low: 35.0, high: 45.0, resamples: 200, method: METHOD, seed: 1 }), unknown: 0, rejected: 0 }
    }

    /// The x coordinates of each band polygon in `svg`.
    fn band_xs(svg: &str) -> Vec<Vec<f64>> {
        svg.split("<polygon class=\"band\" points=\"").skip(1).map(|rest| rest.split('"').next().unwrap_or("").split(' ').filter_map(|xy| xy.split(',').next()?.parse().ok()).collect()).collect()
    }

    #[test]
    fn a_lone_step_with_an_interval_gets_a_band_of_some_width() {
        let frame = Frame { from: 0, until: 600, step: 60, left: String::new(), right: String::new(), what: String::new(), placement: "" };
        // Steps 0-1 with intervals (one run), step 2 without, step 4 alone with one.
        let pts = [point(0, true), point(60, true), point(120, false), point(240, true)];
        let bands = band_xs(&chart_svg("s", "BLEU", &pts, &[], &frame));
        assert_eq!(bands.len(), 2, "{bands:?}");
        let width = |xs: &[f64]| xs.iter().copied().fold(f64::MIN, f64::max) - xs.iter().copied().fold(f64::MAX, f64::min);
        assert!(width(&bands[0]) > 0.0 && width(&bands[1]) > 0.0, "{bands:?}");
        // The lone step's band spans the middle half of its step: half the run's width (one step).
        assert!((width(&bands[1]) - width(&bands[0]) / 2.0).abs() < 0.2, "{bands:?}");
    }
}
