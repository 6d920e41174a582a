//! `mtgauge status`: the scores of a running server's sessions.

use clap::Args;
use serde_json::{json, Value};

use crate::client::{channel, ClientError};
use super::CliError;
use crate::pb;
use crate::pb::scoring_client::ScoringClient;
use crate::pb::sessions_client::SessionsClient;
use crate::report::{config_json, guard_lines, guards_json, stats_json, stats_lines, IntervalSettings, PROXY_NOTE};
use crate::pb::convert::{config_from_pb, guard_tally_from_pb, interval_of, stats_from_pb};
use crate::metric::resample::{valid_level, DEFAULT_LEVEL};
use crate::metric::ScoreConfig;

/// `status` options.
#[derive(Debug, Args)]
pub struct StatusArgs {
    /// Server URL, e.g. http://127.0.0.1:7410.
    #[arg(long, value_name = "URL")]
    pub server: String,
    /// One session (default: all).
    #[arg(long, value_name = "NAME")]
    pub session: Option<String>,
    /// One JSON object per session (an array without --session); `cumulative` has the fields
    /// of `mtgauge score --json`.
    #[arg(long)]
    pub json: bool,
    /// Confidence level of the intervals, strictly between 0 and 1.
    #[arg(long, value_name = "L", default_value_t = DEFAULT_LEVEL)]
    pub level: f64,
}

/// `stats_json` of a window with each score's interval (as in `score --json`), and the human
/// lines of the intervals.
fn window_view(t: Option<&pb::Totals>, config: &ScoreConfig, indent: &str) -> (Value, Vec<String>) {
    let empty = pb::Totals::default();
    let t = t.unwrap_or(&empty);
    let mut m = stats_json(&stats_from_pb(t), config);
    let mut lines = Vec::new();
    for metric in config.metric_list() {
        let Some(i) = interval_of(t, metric) else { continue };
        if let Some(Value::Object(o)) = m.get_mut(metric.name()) {
            o.insert("interval".into(), serde_json::to_value(i).unwrap_or(Value::Null));
        }
        lines.push(format!("{indent}{:<8}{:>6.2} .. {:.2}   {}% interval, {} resamples, seed {}", metric.title(), i.low, i.high, (100.0 * i.level * 1e6).round() / 1e6, i.resamples, i.seed));
    }
    (Value::Object(m), lines)
}

fn render(r: &pb::ScoresReport, info: &pb::SessionInfo, level: f64) -> Result<(Value, String), CliError> {
    let config = config_from_pb(r.config.as_ref()).map_err(|e| CliError::Usage(format!("server sent a bad configuration: {e}")))?;
    let cumulative = stats_from_pb(r.cumulative.as_ref().unwrap_or(&Default::default()));
    let recent = stats_from_pb(r.recent.as_ref().unwrap_or(&Default::default()));
    let (cum_json, cum_ranges) = window_view(r.cumulative.as_ref(), &config, "    ");
    let (recent_json, recent_ranges) = window_view(r.recent.as_ref(), &config, "    ");
    let resampling = r.resampling.unwrap_or_default();
    let mut config_j = config_json(&config);
    // The settings behind the intervals, as `score --interval` records them.
    if let (Value::Object(c), Some(n @ 1..)) = (&mut config_j, resampling.resamples) {
        let settings = IntervalSettings { resamples: n as usize, seed: resampling.seed.unwrap_or_default(), level };
        c.insert("interval".into(), settings.json());
    }
    let guards = guard_tally_from_pb(&r.guards.clone().unwrap_or_default());
    let target = (!r.target_language.is_empty()).then_some(r.target_language.as_str());
    let j = json!({
        "session": r.session,
        "guards": guards_json(&guards, target),
        "labels": info.labels,
        "refset": { "name": info.refset, "digest": r.refset_digest },
        "config": config_j,
        "cumulative": cum_json,
        "recent": recent_json,
        "interval_note": (!r.interval_note.is_empty()).then_some(&r.interval_note),
        "alerts": r.alerts.iter().map(|a| json!({
            "rule": a.rule, "state": a.state, "since_unix": a.since_unix, "condition": a.condition,
            "value": a.value, "low": a.low, "high": a.high, "segments": a.segments, "severity": a.severity,
            "statistic": a.statistic,
        })).collect::<Vec<_>>(),
        "window": r.window,
        "memory_bytes": info.memory_bytes,
        "unknown": r.unknown,
        "rejected": r.rejected,
        "unix_time": r.unix_time,
        "note": PROXY_NOTE,
    });
    let mut text = format!("session {} (reference set {}, digest {})\n", r.session, info.refset, &r.refset_digest[..16.min(r.refset_digest.len())]);
    text += &format!("  cumulative: {} segments scored, {} unknown, {} rejected\n", cumulative.segments, r.unknown, r.rejected);
    for l in stats_lines(&cumulative, &config, "    ").into_iter().chain(cum_ranges) {
        text += &l;
        text.push('\n');
    }
    text += &format!("  recent (last {} segments): {} segments\n", r.window, recent.segments);
    for l in stats_lines(&recent, &config, "    ").into_iter().chain(recent_ranges) {
        text += &l;
        text.push('\n');
    }
    if guards.checked > 0 || target.is_some() {
        for l in guard_lines(&guards, target, "  ") {
            text += &l;
            text.push('\n');
        }
    }
    for al in &r.alerts {
        let measured = match (al.value, al.low, al.high) {
            (Some(v), Some(lo), Some(hi)) => {
                let test = al.statistic.map_or_else(String::new, |s| format!(", test statistic {s:.2}"));
                format!("{v:.2} ({lo:.2} .. {hi:.2}, {} segments{test})", al.segments)
            }
            _ => "nothing to judge by yet".to_owned(),
        };
        text += &format!("  alert   {:<8} {} [{}]: {}; now {measured}\n", al.state.to_uppercase(), al.rule, al.severity, al.condition);
    }
    if !r.interval_note.is_empty() {
        text += &format!("  note    {}\n", r.interval_note);
    }
    text += &format!("  config  {}\n", config.describe());
    text += &format!("  memory  {} bytes of session tables\n", info.memory_bytes);
    Ok((j, text))
}

pub(super) fn run(a: StatusArgs) -> Result<(), CliError> {
    if !valid_level(a.level) {
        return Err(CliError::Usage(format!("--level {} is not strictly between 0 and 1", a.level)));
    }
    let rt = tokio::runtime::Builder::new_current_thread().enable_all().build().map_err(|e| CliError::Usage(format!("cannot start the runtime: {e}")))?;
    let rendered = rt.block_on(async {
        let ch = channel(&a.server)?;
        let mut sessions = SessionsClient::new(ch.clone());
        let mut scoring = ScoringClient::new(ch);
        let infos = match &a.session {
            Some(name) => vec![sessions.get(pb::GetSessionRequest { name: name.clone() }).await.map_err(|s| ClientError::call("get session", s))?.into_inner()],
            None => sessions.list(pb::ListSessionsRequest {}).await.map_err(|s| ClientError::call("list sessions", s))?.into_inner().sessions,
        };
        let mut out = Vec::new();
        for info in infos {
            let r = scoring.get_scores(pb::GetScoresRequest { session: info.name.clone(), level: a.level }).await.map_err(|s| ClientError::call("get scores", s))?.into_inner();
            out.push(render(&r, &info, a.level)?);
        }
        Ok::<_, CliError>(out)
    })?;
    let text = if a.json {
        let v: Vec<Value> = rendered.iter().map(|(j, _)| j.clone()).collect();
        let v = if a.session.is_some() { v.into_iter().next().unwrap_or(Value::Null) } else { Value::Array(v) };
        serde_json::to_string_pretty(&v).unwrap_or_default() + "\n"
    } else if rendered.is_empty() {
        "no sessions\n".to_owned()
    } else {
        rendered.iter().map(|(_, t)| t.as_str()).collect::<Vec<_>>().join("\n") + PROXY_NOTE + "\n"
    };
    print!("{text}");
    Ok(())
}
