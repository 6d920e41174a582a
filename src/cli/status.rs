//! `mtgauge status`: the scores of a running server's sessions.

use clap::Args;
use serde_json::{json, Value};

use crate::client::fleet::{identify, Endpoint, Fleet};
use crate::client::ClientError;
use super::CliError;
use crate::pb;
use crate::pb::scoring_client::ScoringClient;
use crate::pb::sessions_client::SessionsClient;
use crate::report::{config_json, guard_lines, guard_setup_line, guards_json, insert_guard_setup, stats_json, stats_lines, IntervalSettings, PROXY_NOTE};
use crate::guard::GuardCounts;
use crate::pb::convert::{config_from_pb, guard_tally_from_pb, guard_tally_to_pb, interval_of, replicate_sums_from_pb, stats_from_pb, totals_with_intervals};
use crate::metric::resample::{valid_level, DEFAULT_LEVEL};
use crate::metric::resample::Replicates;
use crate::metric::{CorpusStats, ScoreConfig};

/// `status --help`: what it shows, fleets, and the watch view (its defaults from the constants).
pub(super) fn long_about() -> String {
    format!(
        "\
The scores of a running server's sessions: cumulative and recent statistics, scores with their \
bootstrap intervals, alert states. External metrics (values the producer sent with its items) \
show their mean and interval since creation or reset (JSON `external`) and over the last \
`window` items that carried values, scored or sent for their values alone (JSON \
`recent_external`). The reference-free guards' counts (JSON `guards`) come with what the \
session's guards learned from its reference set: the expected length ratio and whether it was \
learned, set or left at its default, and the language vocabulary's size or why there is none.

A fleet: --server with several URLs (comma-separated), or a name that resolves to every \
replica, shows each session's fleet figures: the replicas' integer statistics and bootstrap \
replicate sums added up (exact, never an average of scores), with how many replicas answered. \
When one does not answer, status refuses to show a fleet figure (it would leave out what that \
replica counted) unless --partial is given. `recent` is then the sum of each replica's own \
recent window. Alert states are each daemon's own (see `status --server` of one replica); \
fleet alerts come from the Prometheus rules `mtgauge rules` renders.

--watch keeps showing the sessions until Ctrl-C, redrawn in place every --every seconds (default \
{} seconds): per session the cumulative and recent scores with their intervals, a sparkline of the last \
hour's score per minute (its first metric, from the daemon's history; a dot marks a minute \
without segments, and the height spans at least {} points so that noise does not look like a \
collapse), segments per second since the previous refresh, the shares of unknown and rejected \
items, guard counts and alert states. When standard output is not a terminal (a pipe, a file), \
it prints one plain line per session per refresh instead, starting with the UTC time. Ctrl-C \
(or SIGTERM) ends it with the cursor shown again and exit code 0.",
        super::watch::DEFAULT_WATCH_SECONDS,
        super::watch::SPARK_MIN_SPAN,
    )
}

/// `status` options.
#[derive(Debug, Args)]
pub struct StatusArgs {
    /// Server URL, e.g. http://127.0.0.1:7410; for a fleet, several URLs separated by commas,
    /// or one whose name resolves to every replica.
    #[arg(long, value_name = "URL[,URL...]")]
    pub server: String,
    /// Fleet: show the sum of the replicas that answered when some do not (marked partial).
    #[arg(long)]
    pub partial: bool,
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
    /// Keep watching until Ctrl-C: one block per session, redrawn in place every --every
    /// seconds, with scores and intervals, a sparkline of the last hour's score per minute,
    /// segments per second, unknown and rejected shares, guard counts and alert states. When
    /// standard output is not a terminal, one plain line per session per refresh instead.
    #[arg(long, conflicts_with = "json")]
    pub watch: bool,
    /// With --watch, how many seconds pass between refreshes (a whole number, at least 1).
    #[arg(long, value_name = "SECONDS", default_value_t = super::watch::DEFAULT_WATCH_SECONDS, requires = "watch")]
    pub every: u64,
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

/// The external metrics of a window: JSON (exact sums as decimal strings) and one line each.
pub(crate) fn external_view(t: Option<&pb::Totals>, indent: &str) -> (Value, Vec<String>) {
    let results = t.map_or(&[][..], |t| &t.external[..]);
    let json = results
        .iter()
        .map(|e| {
            json!({
                "metric": e.metric, "values": e.count, "mean": e.mean, "stddev": e.stddev,
                "interval": e.interval.as_ref().map(|i| json!({"level": i.level, "low": i.low, "high": i.high, "resamples": i.resamples, "method": i.method, "seed": i.seed})),
                "fixed_point": {"decimals": e.decimals, "sum": e.sum, "squares": e.squares},
                "better": if e.lower_is_better { "lower" } else { "higher" },
            })
        })
        .collect::<Vec<_>>();
    let lines = results
        .iter()
        .map(|e| {
            let d = e.decimals.min(6) as usize;
            let mean = e.mean.map_or_else(|| "no values".to_owned(), |m| format!("mean {m:.d$}"));
            let range = e.interval.as_ref().map_or_else(String::new, |i| format!(" ({:.d$} .. {:.d$}, {}% interval)", i.low, i.high, (100.0 * i.level * 1e6).round() / 1e6));
            let sd = e.stddev.map_or_else(String::new, |s| format!(", stddev {s:.d$}"));
            format!("{indent}{:<12}{mean}{range}{sd}, {} values, {} is better", e.metric, e.count, if e.lower_is_better { "lower" } else { "higher" })
        })
        .collect();
    (Value::Array(json), lines)
}

fn render(r: &pb::ScoresReport, info: &pb::SessionInfo, level: f64) -> Result<(Value, String), CliError> {
    let config = config_from_pb(r.config.as_ref()).map_err(|e| CliError::Usage(format!("server sent a bad configuration: {e}")))?;
    let cumulative = stats_from_pb(r.cumulative.as_ref().unwrap_or(&Default::default()));
    let recent = stats_from_pb(r.recent.as_ref().unwrap_or(&Default::default()));
    let (cum_json, cum_ranges) = window_view(r.cumulative.as_ref(), &config, "    ");
    let (recent_json, recent_ranges) = window_view(r.recent.as_ref(), &config, "    ");
    let (external_json, external_lines) = external_view(r.cumulative.as_ref(), "    ");
    let (recent_external_json, recent_external_lines) = external_view(r.recent.as_ref(), "    ");
    let resampling = r.resampling.unwrap_or_default();
    let mut config_j = config_json(&config);
    // The settings behind the intervals, as `score --interval` records them.
    if let (Value::Object(c), Some(n @ 1..)) = (&mut config_j, resampling.resamples) {
        let settings = IntervalSettings { resamples: n as usize, seed: resampling.seed.unwrap_or_default(), level };
        c.insert("interval".into(), settings.json());
    }
    let guards = guard_tally_from_pb(&r.guards.clone().unwrap_or_default());
    let target = (!r.target_language.is_empty()).then_some(r.target_language.as_str());
    let setup = info.guard_setup.as_ref().and_then(crate::pb::convert::guard_setup_from_pb);
    let mut guards_j = guards_json(&guards, target);
    if let Some(setup) = &setup {
        insert_guard_setup(&mut guards_j, setup);
    }
    let j = json!({
        "session": r.session,
        "guards": guards_j,
        "labels": info.labels,
        "refset": { "name": info.refset, "digest": r.refset_digest },
        "config": config_j,
        "cumulative": cum_json,
        "recent": recent_json,
        "external": external_json,
        "recent_external": recent_external_json,
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
    if !external_lines.is_empty() {
        text += "  external metrics (cumulative):\n";
        for l in external_lines {
            text += &l;
            text.push('\n');
        }
    }
    text += &format!("  recent (last {} segments): {} segments\n", r.window, recent.segments);
    for l in stats_lines(&recent, &config, "    ").into_iter().chain(recent_ranges) {
        text += &l;
        text.push('\n');
    }
    if !recent_external_lines.is_empty() {
        text += &format!("  external metrics (recent: the last {} items that carried values):\n", r.window);
        for l in recent_external_lines {
            text += &l;
            text.push('\n');
        }
    }
    if guards.checked > 0 || target.is_some() {
        for l in guard_lines(&guards, target, "  ").into_iter().chain(setup.as_ref().map(|s| guard_setup_line(s, "    "))) {
            text += &l;
            text.push('\n');
        }
    }
    for al in &r.alerts {
        let measured = match (al.value, al.low, al.high) {
            (Some(v), Some(lo), Some(hi)) => {
                let test = al.statistic.map_or_else(String::new, |s| format!(", test statistic {s:.2} of its limit"));
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
    let fleet = Fleet::parse(&a.server, std::time::Duration::ZERO, false)?;
    let rt = tokio::runtime::Builder::new_current_thread().enable_all().build().map_err(|e| CliError::Usage(format!("cannot start the runtime: {e}")))?;
    if a.watch {
        return rt.block_on(super::watch::run(&fleet, &a));
    }
    let shown = rt.block_on(fetch(&fleet, a.session.as_deref(), a.level, a.partial))?;
    let rendered = shown.iter().map(|s| rendered(s, a.level)).collect::<Result<Vec<_>, _>>()?;
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

/// One session as status shows it: its description, its report (for a fleet, the replicas'
/// reports added up) and, for a fleet, what the `fleet` JSON field and the headline say.
pub(super) struct Shown {
    pub info: pb::SessionInfo,
    pub report: pb::ScoresReport,
    pub fleet: Option<(Value, String)>,
}

/// The sessions of one server or a fleet (or the one asked for), each with its report.
pub(super) async fn fetch(fleet: &Fleet, session: Option<&str>, level: f64, partial: bool) -> Result<Vec<Shown>, CliError> {
    if let Some(one) = fleet.lone().await? {
        return Ok(reports(&one, session, level, false).await?.into_iter().map(|(info, report)| Shown { info, report, fleet: None }).collect());
    }
    fleet_view(&fleet.endpoints().await?, session, level, partial).await
}

/// The JSON and human text of one shown session.
fn rendered(s: &Shown, level: f64) -> Result<(Value, String), CliError> {
    let (mut j, text) = render(&s.report, &s.info, level)?;
    let Some((fleet, head)) = &s.fleet else { return Ok((j, text)) };
    if let Value::Object(o) = &mut j {
        o.insert("fleet".into(), fleet.clone());
        o.insert("alerts".into(), Value::Array(Vec::new()));
    }
    Ok((j, head.clone() + &text))
}

/// Every session of one server (or the one asked for) with its report.
async fn reports(e: &Endpoint, session: Option<&str>, level: f64, with_sums: bool) -> Result<Vec<(pb::SessionInfo, pb::ScoresReport)>, ClientError> {
    let ch = e.connect()?;
    let mut sessions = SessionsClient::new(ch.clone());
    let mut scoring = ScoringClient::new(ch);
    let infos = match session {
        Some(name) => vec![sessions.get(pb::GetSessionRequest { name: name.to_owned() }).await.map_err(|s| ClientError::call("get session", s))?.into_inner()],
        None => sessions.list(pb::ListSessionsRequest {}).await.map_err(|s| ClientError::call("list sessions", s))?.into_inner().sessions,
    };
    let mut out = Vec::new();
    for info in infos {
        let r = scoring.get_scores(pb::GetScoresRequest { session: info.name.clone(), level, with_replicate_sums: with_sums }).await.map_err(|s| ClientError::call("get scores", s))?.into_inner();
        out.push((info, r));
    }
    Ok(out)
}

/// One replica's answer: its name (or URL) and its sessions' reports.
struct ReplicaReports {
    name: String,
    sessions: Vec<(pb::SessionInfo, pb::ScoresReport)>,
}

/// Every replica's reports summed per session: the fleet figures.
async fn fleet_view(endpoints: &[Endpoint], session: Option<&str>, level: f64, partial: bool) -> Result<Vec<Shown>, CliError> {
    let mut answered = Vec::new();
    let mut missing = Vec::new();
    for e in endpoints {
        let name = identify(e.clone()).await.ok().map(|id| id.replica).filter(|n| !n.is_empty()).unwrap_or_else(|| e.url.clone());
        match reports(e, session, level, true).await {
            Ok(sessions) => answered.push(ReplicaReports { name, sessions }),
            // This replica has no such session: it counted nothing of it.
            Err(ClientError::Call { status, .. }) if status.code() == tonic::Code::NotFound && session.is_some() => answered.push(ReplicaReports { name, sessions: Vec::new() }),
            Err(err) => missing.push(format!("{} ({err})", e.url)),
        }
    }
    if !missing.is_empty() && !partial {
        return Err(CliError::Usage(format!(
            "{} of {} replicas answered; no answer from {}: a fleet figure would leave out what it counted (--partial shows the sum of those that answered)",
            answered.len(), endpoints.len(), missing.join(", ")
        )));
    }
    let mut names: Vec<String> = Vec::new();
    for r in &answered {
        for (info, _) in &r.sessions {
            if !names.contains(&info.name) {
                names.push(info.name.clone());
            }
        }
    }
    if names.is_empty() {
        if let Some(s) = session {
            return Err(CliError::Usage(format!("no replica has a session named '{s}'")));
        }
    }
    let mut out = Vec::new();
    for name in names {
        let parts: Vec<(&str, &pb::SessionInfo, &pb::ScoresReport)> = answered.iter().flat_map(|r| r.sessions.iter().filter(|(i, _)| i.name == name).map(move |(i, rep)| (r.name.as_str(), i, rep))).collect();
        let (info, report) = merge(&parts, level)?;
        let holders: Vec<&str> = parts.iter().map(|(n, _, _)| *n).collect();
        let fleet = json!({
            "replicas": endpoints.len(), "answered": answered.iter().map(|r| r.name.as_str()).collect::<Vec<_>>(),
            "missing": missing, "partial": !missing.is_empty(), "with_session": holders,
            "recent": "the sum of each replica's own recent window",
        });
        let head = format!(
            "fleet: {} of {} replicas answered{}; session on {} ({}); recent = each replica's window summed\n",
            answered.len(), endpoints.len(), if missing.is_empty() { String::new() } else { format!(" (PARTIAL: no answer from {})", missing.join(", ")) },
            holders.len(), holders.join(", ")
        );
        out.push(Shown { info, report, fleet: Some((fleet, head)) });
    }
    Ok(out)
}

/// One session's reports from several replicas, added up: statistics, counts and replicate
/// sums (exact), with the intervals derived from the summed replicates. Refused when the
/// replicas score the session differently (reference-set version, configuration, resampling).
fn merge(parts: &[(&str, &pb::SessionInfo, &pb::ScoresReport)], level: f64) -> Result<(pb::SessionInfo, pb::ScoresReport), CliError> {
    let (first_name, first_info, first) = parts[0];
    let config = config_from_pb(first.config.as_ref()).map_err(|e| CliError::Usage(format!("{first_name} sent a bad configuration: {e}")))?;
    let mut info = first_info.clone();
    let mut merged = pb::ScoresReport { session: first.session.clone(), refset_digest: first.refset_digest.clone(), config: first.config.clone(), window: first.window, note: first.note.clone(), resampling: first.resampling, unix_time: first.unix_time, ..Default::default() };
    let (mut cum, mut recent) = (CorpusStats::default(), CorpusStats::default());
    let mut reps: [Option<Replicates>; 2] = [None, None];
    let mut complete = [true, true];
    let mut notes: Vec<String> = Vec::new();
    let mut guards = GuardCounts::default();
    for (i, (name, inf, r)) in parts.iter().enumerate() {
        if r.refset_digest != first.refset_digest || r.config != first.config || r.resampling != first.resampling || r.target_language != first.target_language {
            return Err(CliError::Usage(format!(
                "replicas {first_name} and {name} score session '{}' differently (reference-set digest, configuration, resampling or target language): its statistics do not add up to a fleet figure",
                first.session
            )));
        }
        cum += stats_from_pb(r.cumulative.as_ref().unwrap_or(&Default::default()));
        recent += stats_from_pb(r.recent.as_ref().unwrap_or(&Default::default()));
        merged.unknown += r.unknown;
        merged.rejected += r.rejected;
        guards += guard_tally_from_pb(&r.guards.clone().unwrap_or_default());
        merged.unix_time = merged.unix_time.max(r.unix_time);
        if i > 0 {
            info.scored += inf.scored;
            info.memory_bytes += inf.memory_bytes;
        }
        for (k, sums) in [&r.cumulative_sums, &r.recent_sums].into_iter().enumerate() {
            match sums.as_ref().and_then(|p| replicate_sums_from_pb(p, &config)) {
                Some(x) if complete[k] => match &mut reps[k] {
                    Some(acc) => {
                        if acc.merge(&x).is_err() {
                            complete[k] = false;
                        }
                    }
                    None => reps[k] = Some(x),
                },
                _ => complete[k] = false,
            }
        }
        if !r.interval_note.is_empty() && !notes.contains(&r.interval_note) {
            notes.push(r.interval_note.clone());
        }
    }
    let [cum_reps, recent_reps] = reps;
    let mut cumulative = totals_with_intervals(&cum, &config, cum_reps.as_ref().filter(|_| complete[0]), level);
    let external: Vec<&[pb::ExternalResult]> = parts.iter().map(|(_, _, r)| r.cumulative.as_ref().map_or(&[][..], |t| &t.external[..])).collect();
    cumulative.external = crate::pb::external::merge_results(&external, level).map_err(|e| CliError::Usage(format!("session '{}': {}", first.session, e.0)))?;
    let mut recent = totals_with_intervals(&recent, &config, recent_reps.as_ref().filter(|_| complete[1]), level);
    let external: Vec<&[pb::ExternalResult]> = parts.iter().map(|(_, _, r)| r.recent.as_ref().map_or(&[][..], |t| &t.external[..])).collect();
    recent.external = crate::pb::external::merge_results(&external, level).map_err(|e| CliError::Usage(format!("session '{}': {}", first.session, e.0)))?;
    let no_interval = |t: &pb::Totals| t.external.iter().any(|e| e.count > 0 && e.interval.is_none());
    if first.resampling.and_then(|r| r.resamples).unwrap_or(0) > 0 && (no_interval(&cumulative) || no_interval(&recent)) {
        notes.push("some replica sent no external replicate sums: no fleet interval for those external metrics".into());
    }
    merged.cumulative = Some(cumulative);
    merged.recent = Some(recent);
    if first.resampling.and_then(|r| r.resamples).unwrap_or(0) > 0 && !(complete[0] && complete[1]) {
        notes.push("some replica sent no replicate sums for a window: no fleet interval for it".into());
    }
    merged.interval_note = notes.join("; ");
    merged.guards = Some(guard_tally_to_pb(&guards));
    merged.target_language = first.target_language.clone();
    Ok((info, merged))
}
