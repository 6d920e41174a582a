//! `mtgauge status`: the scores of a running server's sessions.

use clap::Args;
use serde_json::{json, Value};

use crate::client::{channel, ClientError};
use super::CliError;
use crate::pb;
use crate::pb::scoring_client::ScoringClient;
use crate::pb::sessions_client::SessionsClient;
use crate::report::{config_json, stats_json, stats_lines, PROXY_NOTE};
use crate::pb::convert::{config_from_pb, stats_from_pb};

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
}

fn render(r: &pb::ScoresReport, info: &pb::SessionInfo) -> Result<(Value, String), CliError> {
    let config = config_from_pb(r.config.as_ref()).map_err(|e| CliError::Usage(format!("server sent a bad configuration: {e}")))?;
    let cumulative = stats_from_pb(r.cumulative.as_ref().unwrap_or(&Default::default()));
    let recent = stats_from_pb(r.recent.as_ref().unwrap_or(&Default::default()));
    let j = json!({
        "session": r.session,
        "labels": info.labels,
        "refset": { "name": info.refset, "digest": r.refset_digest },
        "config": config_json(&config),
        "cumulative": Value::Object(stats_json(&cumulative, &config)),
        "recent": Value::Object(stats_json(&recent, &config)),
        "window": r.window,
        "memory_bytes": info.memory_bytes,
        "unknown": r.unknown,
        "rejected": r.rejected,
        "unix_time": r.unix_time,
        "note": PROXY_NOTE,
    });
    let mut text = format!("session {} (reference set {}, digest {})\n", r.session, info.refset, &r.refset_digest[..16.min(r.refset_digest.len())]);
    text += &format!("  cumulative: {} segments scored, {} unknown, {} rejected\n", cumulative.segments, r.unknown, r.rejected);
    for l in stats_lines(&cumulative, &config, "    ") {
        text += &l;
        text.push('\n');
    }
    text += &format!("  recent (last {} segments): {} segments\n", r.window, recent.segments);
    for l in stats_lines(&recent, &config, "    ") {
        text += &l;
        text.push('\n');
    }
    text += &format!("  config  {}\n", config.describe());
    text += &format!("  memory  {} bytes of session tables\n", info.memory_bytes);
    Ok((j, text))
}

pub(super) fn run(a: StatusArgs) -> Result<(), CliError> {
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
            let r = scoring.get_scores(pb::GetScoresRequest { session: info.name.clone() }).await.map_err(|s| ClientError::call("get scores", s))?.into_inner();
            out.push(render(&r, &info)?);
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
