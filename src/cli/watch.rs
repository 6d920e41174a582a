//! `mtgauge status --watch`: a live view of a server's sessions, redrawn in place on a
//! terminal (ANSI cursor-home and clear), one plain line per session per refresh otherwise.

use std::collections::HashMap;
use std::io::{IsTerminal, Write};
use std::time::{Duration, Instant, SystemTime, UNIX_EPOCH};

use super::report::{fleet_history, get_history};
use super::status::{fetch, Shown, StatusArgs};
use super::CliError;
use crate::client::fleet::Fleet;
use crate::guard::{Guard, GuardCounts};
use crate::metric::{Metric, ScoreConfig};
use crate::pb;
use crate::pb::convert::{config_from_pb, guard_tally_from_pb, interval_of, score_of};
use crate::report::PROXY_NOTE;

/// Seconds between refreshes unless `--every` says otherwise.
pub const DEFAULT_WATCH_SECONDS: u64 = 2;
/// Width of one sparkline step: the daemon's minute buckets.
pub const SPARK_STEP_SECONDS: i64 = 60;
/// Steps the sparkline shows: the last hour, one character a minute.
pub const SPARK_STEPS: i64 = 60;
/// The sparkline's characters, lowest to highest score.
pub const SPARK_LEVELS: [char; 8] = ['▁', '▂', '▃', '▄', '▅', '▆', '▇', '█'];
/// A minute in which no segment was scored.
pub const SPARK_EMPTY: char = '·';
/// Smallest score range (points, 0-100 scale) the sparkline's height spans, centred on the
/// hour's scores: a change of a few tenths of a point does not look like a collapse.
pub const SPARK_MIN_SPAN: f64 = 5.0;

/// ANSI: cursor to the top-left corner, then clear the screen.
const HOME_AND_CLEAR: &str = "\x1b[H\x1b[2J";
/// ANSI: hide the cursor while the view is drawn.
const HIDE_CURSOR: &str = "\x1b[?25l";
/// ANSI: show the cursor again.
const SHOW_CURSOR: &str = "\x1b[?25h";

/// Segments per second of a session between two refreshes.
#[derive(Debug, Clone, Copy, PartialEq)]
enum Rate {
    /// First refresh: nothing to compare with yet.
    Measuring,
    PerSecond(f64),
    /// The count went down: the session was reset (or recreated) in between.
    Reset,
}

/// The last hour of a session's per-minute scores, or why there is none.
type Spark = Result<(Metric, Vec<Option<f64>>), String>;

/// One session as the watch shows it.
struct View<'a> {
    shown: &'a Shown,
    config: ScoreConfig,
    rate: Rate,
    spark: Option<Spark>,
}

/// `status --watch`: refresh every `a.every` seconds until Ctrl-C (or SIGTERM).
pub(super) async fn run(fleet: &Fleet, a: &StatusArgs) -> Result<(), CliError> {
    if a.every == 0 {
        return Err(CliError::Usage("--every must be at least 1 second".into()));
    }
    let terminal = std::io::stdout().is_terminal();
    let mut stop = std::pin::pin!(stop_signal());
    let mut out = std::io::stdout();
    let mut last_counts: HashMap<String, (Instant, u64)> = HashMap::new();
    let mut last_frame: Option<Vec<String>> = None;
    let mut answered = false;
    if terminal {
        put(&mut out, HIDE_CURSOR)?;
    }
    let result = loop {
        let refresh = refresh(fleet, a, terminal, &mut last_counts);
        let answer = tokio::select! {
            r = refresh => r,
            _ = &mut stop => break Ok(()),
        };
        let now = utc_now();
        let text = match answer {
            Ok(lines) if terminal => {
                let text = frame(&a.server, a.every, &now, None, &lines);
                last_frame = Some(lines);
                text
            }
            Ok(lines) => lines.iter().map(|l| format!("{now} {l}\n")).collect(),
            // The first answer decides whether the flags make sense (URL, session name).
            Err(e) if !answered => break Err(e),
            Err(e) if terminal => frame(&a.server, a.every, &now, Some(&e.to_string()), last_frame.as_deref().unwrap_or_default()),
            Err(e) => {
                eprintln!("mtgauge: {now}: refresh failed: {e}");
                String::new()
            }
        };
        answered = true;
        if let Err(e) = put(&mut out, &text) {
            break Err(e);
        }
        tokio::select! {
            _ = tokio::time::sleep(Duration::from_secs(a.every)) => {}
            _ = &mut stop => break Ok(()),
        }
    };
    if terminal {
        // Ctrl-C leaves the cursor wherever the terminal echoed it: show it again, end the line.
        let _ = put(&mut out, &format!("{SHOW_CURSOR}\n"));
    }
    // A reader that goes away (`| head`) ends the process by SIGPIPE before this (main.rs).
    result
}

/// Ctrl-C (SIGINT), or SIGTERM (`kill`): either ends the watch the same clean way. Never
/// resolves when no handler can be installed (the default actions then stay).
async fn stop_signal() {
    #[cfg(unix)]
    if let Ok(mut term) = tokio::signal::unix::signal(tokio::signal::unix::SignalKind::terminate()) {
        tokio::select! {
            r = tokio::signal::ctrl_c() => if r.is_err() { term.recv().await; },
            _ = term.recv() => {}
        }
        return;
    }
    if tokio::signal::ctrl_c().await.is_err() {
        std::future::pending::<()>().await;
    }
}

/// Write and flush `text` on standard output.
fn put(out: &mut std::io::Stdout, text: &str) -> Result<(), CliError> {
    let mut lock = out.lock();
    lock.write_all(text.as_bytes()).and_then(|()| lock.flush()).map_err(|source| CliError::Output { what: "standard output".into(), source })
}

/// "2026-12-04T21:10:03Z".
fn utc_now() -> String {
    let s = crate::alerts::deliver::rfc3339(SystemTime::now());
    format!("{}Z", &s[..19])
}

/// One refresh: every session's lines (a block each on a terminal, one line each otherwise).
async fn refresh(fleet: &Fleet, a: &StatusArgs, terminal: bool, last_counts: &mut HashMap<String, (Instant, u64)>) -> Result<Vec<String>, CliError> {
    let shown = fetch(fleet, a.session.as_deref(), a.level, a.partial).await?;
    let at = Instant::now();
    let mut views = Vec::with_capacity(shown.len());
    for s in &shown {
        let config = config_from_pb(s.report.config.as_ref()).map_err(|e| CliError::Usage(format!("server sent a bad configuration: {e}")))?;
        let segments = s.report.cumulative.as_ref().map_or(0, |t| t.segments);
        let rate = rate(last_counts.insert(s.report.session.clone(), (at, segments)), (at, segments));
        // The plain lines leave the sparkline out: one history call less per session.
        let spark = if terminal { Some(spark(fleet, &s.report.session, a.partial).await) } else { None };
        views.push(View { shown: s, config, rate, spark });
    }
    Ok(match (terminal, views.is_empty()) {
        (true, _) => views.iter().flat_map(|v| block(v).into_iter().chain([String::new()])).collect(),
        // A line each refresh even then: the watch is alive and the server answers.
        (false, true) => vec!["no sessions".to_owned()],
        (false, false) => views.iter().map(line).collect(),
    })
}

/// Segments per second since the previous refresh.
fn rate(previous: Option<(Instant, u64)>, (at, segments): (Instant, u64)) -> Rate {
    let Some((then, before)) = previous else { return Rate::Measuring };
    let seconds = at.duration_since(then).as_secs_f64();
    match segments.checked_sub(before) {
        None => Rate::Reset,
        Some(_) if seconds <= 0.0 => Rate::Measuring,
        Some(d) => Rate::PerSecond(d as f64 / seconds),
    }
}

/// The session's score per minute over the last hour (its first metric), from the history.
async fn spark(fleet: &Fleet, session: &str, partial: bool) -> Spark {
    let now = SystemTime::now().duration_since(UNIX_EPOCH).map_or(0, |d| d.as_secs() as i64);
    // Up to the end of the current minute, so that its open bucket shows too.
    let until = (now / SPARK_STEP_SECONDS + 1) * SPARK_STEP_SECONDS;
    let from = until - SPARK_STEPS * SPARK_STEP_SECONDS;
    let req = pb::GetHistoryRequest { session: session.to_owned(), from_unix: from, until_unix: until, step_seconds: SPARK_STEP_SECONDS as u32, ..Default::default() };
    let report = async {
        match fleet.lone().await? {
            Some(one) => Ok::<_, CliError>(get_history(&one, req).await?),
            None => Ok(fleet_history(&fleet.endpoints().await?, pb::GetHistoryRequest { with_sums: true, ..req }, partial).await?.0),
        }
    }
    .await
    .map_err(|e| e.to_string())?;
    let metric = Metric::ALL.into_iter().find(|m| m.name() == report.metric).ok_or_else(|| format!("unknown metric '{}'", report.metric))?;
    let by_start: HashMap<i64, Option<f64>> = report.points.iter().map(|p| (p.start_unix, p.score.filter(|_| p.segments > 0))).collect();
    Ok((metric, (0..SPARK_STEPS).map(|k| by_start.get(&(from + k * SPARK_STEP_SECONDS)).copied().flatten()).collect()))
}

/// One character per step: its score's height within the steps' range (at least
/// [`SPARK_MIN_SPAN`] points, centred on them), [`SPARK_EMPTY`] where none was scored. Also
/// the lowest and highest score.
fn sparkline(scores: &[Option<f64>]) -> (String, Option<(f64, f64)>) {
    let known = scores.iter().flatten().copied();
    let range = known.clone().fold(None, |r: Option<(f64, f64)>, v| Some(r.map_or((v, v), |(lo, hi)| (lo.min(v), hi.max(v)))));
    let Some((lo, hi)) = range else { return (scores.iter().map(|_| SPARK_EMPTY).collect(), None) };
    let span = (hi - lo).max(SPARK_MIN_SPAN);
    let bottom = (lo + hi) / 2.0 - span / 2.0;
    let top = (SPARK_LEVELS.len() - 1) as f64;
    let text = scores
        .iter()
        .map(|s| match s {
            None => SPARK_EMPTY,
            Some(v) => SPARK_LEVELS[((v - bottom) / span * top).round().clamp(0.0, top) as usize],
        })
        .collect();
    (text, Some((lo, hi)))
}

/// "34.21 (33.10 .. 35.30)", or "-" before anything was scored.
fn score_text(t: Option<&pb::Totals>, m: Metric) -> String {
    let Some(t) = t else { return "-".into() };
    let Some(score) = score_of(t, m).filter(|_| t.segments > 0) else { return "-".into() };
    match interval_of(t, m) {
        Some(i) => format!("{score:.2} ({:.2} .. {:.2})", i.low, i.high),
        None => format!("{score:.2}"),
    }
}

fn rate_text(r: Rate) -> String {
    match r {
        Rate::Measuring => "measuring segments/s".into(),
        Rate::PerSecond(x) => format!("{x:.1} segments/s"),
        Rate::Reset => "reset since the last refresh".into(),
    }
}

/// "1.2%" of `whole`, "-" of nothing.
fn share(part: u64, whole: u64) -> String {
    if whole == 0 {
        "-".into()
    } else {
        format!("{:.1}%", 100.0 * part as f64 / whole as f64)
    }
}

/// "unknown 1.2%, rejected 0.0% of 1234 items".
fn shares_text(r: &pb::ScoresReport) -> String {
    let items = r.cumulative.as_ref().map_or(0, |t| t.segments) + r.unknown + r.rejected;
    format!("unknown {}, rejected {} of {items} items", share(r.unknown, items), share(r.rejected, items))
}

/// "120 checked, flagged: 3 copy, 1 empty", when the guards checked anything.
fn guards_text(r: &pb::ScoresReport) -> Option<String> {
    let g: GuardCounts = guard_tally_from_pb(r.guards.as_ref()?);
    (g.checked > 0).then(|| {
        let flagged: Vec<String> = Guard::ALL.iter().filter(|&&x| g.flagged_by(x) > 0).map(|&x| format!("{} {x}", g.flagged_by(x))).collect();
        format!("{} checked, flagged: {}", g.checked, if flagged.is_empty() { "none".into() } else { flagged.join(", ") })
    })
}

/// "FIRING canary-drop, inactive slow-decline", when rules watch the session.
fn alerts_text(r: &pb::ScoresReport) -> Option<String> {
    (!r.alerts.is_empty()).then(|| r.alerts.iter().map(|a| format!("{} {}", a.state.to_uppercase(), a.rule)).collect::<Vec<_>>().join(", "))
}

/// A session's block of lines on the terminal.
fn block(v: &View) -> Vec<String> {
    let r = &v.shown.report;
    let mut out = Vec::new();
    if let Some((_, head)) = &v.shown.fleet {
        out.push(head.trim_end().to_owned());
    }
    let segments = r.cumulative.as_ref().map_or(0, |t| t.segments);
    out.push(format!("{} (reference set {}): {segments} segments, {}; recent = the last {} segments", r.session, v.shown.info.refset, rate_text(v.rate), r.window));
    for m in v.config.metric_list() {
        out.push(format!("  {:<8} cumulative {:<24} recent {}", m.title(), score_text(r.cumulative.as_ref(), m), score_text(r.recent.as_ref(), m)));
    }
    match &v.spark {
        Some(Ok((m, scores))) => {
            let (line, range) = sparkline(scores);
            let range = range.map_or_else(|| "nothing scored".to_owned(), |(lo, hi)| format!("{lo:.2} .. {hi:.2}"));
            out.push(format!("  {:<8} last hour by minute {line} ({range})", m.title()));
        }
        Some(Err(e)) => out.push(format!("  history  not available: {e}")),
        None => {}
    }
    out.push(format!("  items    {}", shares_text(r)));
    if let Some(g) = guards_text(r) {
        out.push(format!("  guards   {g}"));
    }
    if let Some(al) = alerts_text(r) {
        out.push(format!("  alerts   {al}"));
    }
    out
}

/// A session's one plain line (without the time stamp the caller puts first).
fn line(v: &View) -> String {
    let r = &v.shown.report;
    let segments = r.cumulative.as_ref().map_or(0, |t| t.segments);
    let mut parts = vec![format!("{}: {segments} segments, {}", r.session, rate_text(v.rate))];
    for m in v.config.metric_list() {
        parts.push(format!("{} {}, recent {}", m.title(), score_text(r.cumulative.as_ref(), m), score_text(r.recent.as_ref(), m)));
    }
    parts.push(shares_text(r));
    if let Some(g) = guards_text(r) {
        parts.push(format!("guards {g}"));
    }
    if let Some(al) = alerts_text(r) {
        parts.push(format!("alerts {al}"));
    }
    if v.shown.fleet.is_some() {
        parts.push("fleet sum".into());
    }
    parts.join("; ")
}

/// The whole screen: cursor home and clear, a header, the sessions' blocks (or the last ones
/// under the error of a failed refresh), the proxy reminder.
fn frame(server: &str, every: u64, now: &str, error: Option<&str>, lines: &[String]) -> String {
    let mut text = format!("{HOME_AND_CLEAR}mtgauge status --watch: {server}, every {every} s, {now}; Ctrl-C stops\n");
    if let Some(e) = error {
        text += &format!("refresh failed: {e}; the figures below are from the last refresh that answered\n");
    }
    text.push('\n');
    if lines.is_empty() {
        text += "no sessions\n\n";
    }
    for l in lines {
        text += l;
        text.push('\n');
    }
    text += PROXY_NOTE;
    text.push('\n');
    text
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn sparklines_scale_within_the_hour_and_mark_empty_minutes() {
        // Lowest and highest score take the lowest and highest character; a minute without
        // segments is a dot.
        let (s, range) = sparkline(&[Some(30.0), None, Some(40.0), Some(35.0)]);
        assert_eq!(s, "▁·█▅");
        assert_eq!(range, Some((30.0, 40.0)));
        // Less than SPARK_MIN_SPAN apart: centred, not stretched to the full height.
        let (s, _) = sparkline(&[Some(30.0), Some(30.5)]);
        assert_eq!(s, "▄▅");
        let (s, range) = sparkline(&[None, None]);
        assert_eq!((s.as_str(), range), ("··", None));
        assert_eq!(sparkline(&[]).0, "");
    }

    #[test]
    fn rates_shares_and_scores_read_as_words() {
        let t0 = Instant::now();
        let t1 = t0 + Duration::from_secs(2);
        assert_eq!(rate(None, (t1, 10)), Rate::Measuring);
        assert_eq!(rate(Some((t0, 10)), (t1, 30)), Rate::PerSecond(10.0));
        assert_eq!(rate(Some((t0, 30)), (t1, 10)), Rate::Reset);
        assert_eq!((share(1, 8), share(0, 0)), ("12.5%".to_owned(), "-".to_owned()));
        let t = pb::Totals {
            segments: 3,
            bleu: Some(pb::BleuResult { score: 34.567, interval: Some(pb::Interval { level: 0.95, low: 30.0, high: 38.5, ..Default::default() }), ..Default::default() }),
            ..Default::default()
        };
        assert_eq!(score_text(Some(&t), Metric::Bleu), "34.57 (30.00 .. 38.50)");
        assert_eq!(score_text(Some(&pb::Totals::default()), Metric::Bleu), "-");
        let r = pb::ScoresReport { cumulative: Some(t), unknown: 1, rejected: 0, ..Default::default() };
        assert_eq!(shares_text(&r), "unknown 25.0%, rejected 0.0% of 4 items");
        assert_eq!((guards_text(&r), alerts_text(&r)), (None, None));
    }

    #[test]
    fn frames_start_at_home_and_clear() {
        let f = frame("http://x", 2, "2026-12-04T21:10:03Z", None, &["a".into()]);
        assert!(f.starts_with("\x1b[H\x1b[2J"), "{f:?}");
        assert!(f.contains("\na\n") && f.ends_with(&format!("{PROXY_NOTE}\n")));
        let f = frame("http://x", 2, "t", Some("down"), &[]);
        assert!(f.contains("refresh failed: down") && f.contains("no sessions"));
    }
}
