//! `mtgauge report`: a session's score over time, from the daemon's history, as an SVG file for
//! an incident ticket (the status page's chart with a title, axis captions and the settings).

use std::path::PathBuf;
use std::time::{Duration, UNIX_EPOCH};

use clap::Args;

use super::CliError;
use crate::client::{channel, ClientError};
use crate::pb;
use crate::pb::convert::{config_from_pb, interval_from_pb};
use crate::report::PROXY_NOTE;
use crate::server::history::Point;
use crate::server::page::{report_svg, step_words, Frame};

pub(super) const LONG_ABOUT: &str = "\
Write a session's score over time as an SVG file: the score of each step (computed from the \
summed statistics of the daemon's history buckets, never an average of scores), its 95% bootstrap \
interval as a band where the buckets still keep replicate sums (minute buckets for their first \
hour, hourly ones for their first day, at the daemon's defaults), a title, axis captions with \
units, and a footer with the configuration and the reference set's digest: scores are comparable \
only under the same tokenizer, references and configuration.

--since is how far back (an integer and m, h or d; default 24h); --step the width of one point \
(default: the whole minutes or hours that give at most 120 points). Only .svg is written: \
this build carries no rasterizer for PNG.

Example, the last six hours of a canary session, one point per 5 minutes:
  mtgauge report --server http://127.0.0.1:7410 --session ferry-v8-canary --since 6h --step 5m \\
      --out canary.svg";

/// Most points a default step gives.
pub const DEFAULT_POINTS: i64 = 120;
/// How far back unless told.
pub const DEFAULT_SINCE: &str = "24h";

/// `report` options.
#[derive(Debug, Args)]
pub struct ReportArgs {
    /// Server URL, e.g. http://127.0.0.1:7410 (one replica: history is kept per replica).
    #[arg(long, value_name = "URL")]
    pub server: String,
    /// The session.
    #[arg(long, value_name = "NAME")]
    pub session: String,
    /// The file to write (.svg).
    #[arg(long, value_name = "FILE")]
    pub out: PathBuf,
    /// bleu, chrf or chrf++ (default: the session's first metric).
    #[arg(long, value_name = "METRIC")]
    pub metric: Option<String>,
    /// How far back the chart reaches: 90m, 24h, 7d.
    #[arg(long, value_name = "DURATION", default_value = DEFAULT_SINCE)]
    pub since: String,
    /// One point per this long (whole minutes, or whole hours for hourly buckets).
    #[arg(long, value_name = "DURATION")]
    pub step: Option<String>,
}

/// Seconds of "90m", "24h", "7d".
fn seconds(flag: &str, text: &str) -> Result<i64, CliError> {
    let bad = || CliError::Usage(format!("{flag} {text}: expected a whole number and m, h or d (e.g. 90m, 24h, 7d)"));
    let (n, unit) = text.split_at(text.len().saturating_sub(1));
    let n: i64 = n.parse().map_err(|_| bad())?;
    let unit = match unit {
        "m" => 60,
        "h" => 3600,
        "d" => 86_400,
        _ => return Err(bad()),
    };
    (n > 0).then_some(n * unit).ok_or_else(bad)
}

/// The default step: whole minutes up to an hour, then whole hours, so that `span` gives at
/// most [`DEFAULT_POINTS`] points.
fn default_step(span: i64) -> i64 {
    let up = |x: i64, unit: i64| (x + unit - 1) / unit * unit;
    let minutes = up(span / DEFAULT_POINTS, 60).max(60);
    if minutes < 3600 { minutes } else { up(minutes, 3600) }
}

/// "2026-12-04 15:30 UTC".
fn utc(t: i64) -> String {
    let s = crate::alerts::deliver::rfc3339(UNIX_EPOCH + Duration::from_secs(t.max(0) as u64));
    format!("{} {} UTC", &s[..10], &s[11..16])
}

pub(super) fn run(a: ReportArgs) -> Result<(), CliError> {
    if a.out.extension().and_then(|e| e.to_str()) != Some("svg") {
        return Err(CliError::Usage(format!("--out {}: only .svg files are written (SVG is the one supported format)", a.out.display())));
    }
    let span = seconds("--since", &a.since)?;
    let step = match &a.step {
        Some(s) => seconds("--step", s)?,
        None => default_step(span),
    };
    let rt = tokio::runtime::Builder::new_current_thread().enable_all().build().map_err(|e| CliError::Usage(format!("cannot start the runtime: {e}")))?;
    let (history, scores) = rt.block_on(async {
        let ch = channel(&a.server)?;
        let now = std::time::SystemTime::now().duration_since(UNIX_EPOCH).map_or(0, |d| d.as_secs() as i64);
        let until = (now / step + 1) * step;
        let req = pb::GetHistoryRequest { session: a.session.clone(), metric: a.metric.clone().unwrap_or_default(), from_unix: until - (span + step - 1) / step * step, until_unix: until, step_seconds: step as u32, level: 0.0 };
        let history = pb::history_client::HistoryClient::new(ch.clone()).get_history(req).await.map_err(|s| ClientError::call("get history", s))?.into_inner();
        let scores = pb::scoring_client::ScoringClient::new(ch).get_scores(pb::GetScoresRequest { session: a.session.clone(), ..Default::default() }).await.map_err(|s| ClientError::call("get scores", s))?.into_inner();
        Ok::<_, CliError>((history, scores))
    })?;
    let config = config_from_pb(scores.config.as_ref()).map_err(|e| CliError::Usage(format!("server sent a bad configuration: {e}")))?;
    let points: Vec<Point> = history.points.iter().map(|p| Point { start: p.start_unix, segments: p.segments, score: p.score, interval: p.interval.as_ref().map(interval_from_pb), unknown: p.unknown, rejected: p.rejected }).collect();
    let metric = crate::metric::Metric::ALL.into_iter().find(|m| m.name() == history.metric).map_or(history.metric.clone(), |m| m.title().to_owned());
    let step = i64::from(history.step_seconds);
    let frame = Frame {
        from: history.from_unix,
        until: history.until_unix,
        step,
        left: utc(history.from_unix),
        right: utc(history.until_unix),
        what: format!("{} to {}, per {}", utc(history.from_unix), utc(history.until_unix), step_words(step)),
        placement: "",
    };
    let segments: u64 = points.iter().map(|p| p.segments).sum();
    let footer = vec![
        format!("{} segments in these {} steps; configuration: {}", segments, points.len(), config.describe()),
        format!("reference set digest {}; written by mtgauge {}", scores.refset_digest, env!("CARGO_PKG_VERSION")),
        PROXY_NOTE.to_owned(),
    ];
    let svg = report_svg(&a.session, &metric, &points, &frame, &footer);
    std::fs::write(&a.out, svg).map_err(|e| CliError::Usage(format!("{}: {e}", a.out.display())))?;
    eprintln!("mtgauge report: {} points ({} with segments) written to {}", points.len(), points.iter().filter(|p| p.segments > 0).count(), a.out.display());
    Ok(())
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn durations_and_default_steps() {
        assert_eq!((seconds("--since", "90m").unwrap(), seconds("--since", "24h").unwrap(), seconds("--since", "7d").unwrap()), (5400, 86_400, 604_800));
        for bad in ["", "h", "0h", "-1h", "1.5h", "10s", "1w"] {
            assert!(seconds("--since", bad).is_err(), "{bad}");
        }
        // 1 hour: minute steps; 24 hours: 12-minute steps; 7 days: 2-hour steps.
        assert_eq!((default_step(3600), default_step(86_400), default_step(604_800)), (60, 720, 7200));
        assert!(604_800 / default_step(604_800) <= DEFAULT_POINTS);
        assert_eq!(utc(0), "1970-01-01 00:00 UTC");
    }
}
