//! `mtgauge report`: a session's score over time, from the daemon's history, as an SVG file for
//! an incident ticket (the status page's chart with a title, axis captions and the settings).

use std::path::PathBuf;
use std::time::{Duration, UNIX_EPOCH};

use clap::Args;

use super::CliError;
use crate::client::fleet::{identify, Endpoint, Fleet};
use crate::client::ClientError;
use crate::metric::scores::corpus_score;
use crate::metric::resample::Replicates;
use crate::metric::{CorpusStats, ScoreConfig};
use crate::pb;
use crate::pb::convert::{config_from_pb, interval_from_pb, interval_to_pb, replicate_sums_from_pb, stats_from_pb};
use crate::report::PROXY_NOTE;
use crate::server::history::Point;
use crate::server::page::{report_svg, step_words, Frame, SCORE_BOUNDS};

pub(super) const LONG_ABOUT: &str = "\
Write a session's score over time as an SVG or PNG file (by the --out file's extension): the score of each step (computed from the \
summed statistics of the daemon's history buckets, never an average of scores), its 95% bootstrap \
interval as a band where the buckets still keep replicate sums (minute buckets for their first \
hour, hourly ones for their first day, at the daemon's defaults), a title, axis captions with \
units, and a footer with the configuration and the reference set's digest: scores are comparable \
only under the same tokenizer, references and configuration.

A fleet: --server with several URLs (comma-separated), or a name that resolves to every \
replica. History is kept per replica; the report adds up each step's integer statistics and \
bootstrap replicate sums over the replicas (exact, never an average of scores) and derives the \
score and band from the sums. When a replica does not answer, it refuses (the chart would leave \
out what that replica counted) unless --partial is given; the footer names the replicas summed.

An external metric the session declares (--metric with its name): the mean of the values that \
arrived in each step, in the metric's own units (the y axis captioned \"NAME (LOW\u{2013}HIGH)\" with its \
declared range), and as its band the 95% normal-theory interval of the mean from the step's count, \
sum and sum of squares (Student's t). Over a fleet, each step's count, sum and squares are added \
up over the replicas first.

--since is how far back (an integer and m, h or d; default 24h); --step the width of one point \
(default: the whole minutes or hours that give at most 120 points). A .png is the same drawing \
rendered at twice its size (1360 pixels wide) with the system's fonts (DejaVu Sans where \
installed), for tickets that show no SVG.

Example, the last six hours of a canary session, one point per 5 minutes:
  mtgauge report --server http://127.0.0.1:7410 --session ferry-v8-canary --since 6h --step 5m \\
      --out canary.svg";

/// Pixels per SVG unit of a PNG report (sharp on high-density screens).
pub const PNG_SCALE: f32 = 2.0;
/// The font family drawn for `sans-serif` in a PNG report when the system has it.
pub const PNG_SANS_SERIF: &str = "DejaVu Sans";

/// `svg` (a report drawn by [`report_svg`]) rendered as a PNG image, [`PNG_SCALE`] pixels per
/// unit, with the system's fonts.
pub fn svg_to_png(svg: &str) -> Result<Vec<u8>, String> {
    use resvg::{tiny_skia, usvg};
    let mut opt = usvg::Options::default();
    let db = opt.fontdb_mut();
    db.load_system_fonts();
    if db.faces().any(|f| f.families.iter().any(|(name, _)| name == PNG_SANS_SERIF)) {
        db.set_sans_serif_family(PNG_SANS_SERIF);
    }
    let tree = usvg::Tree::from_str(svg, &opt).map_err(|e| e.to_string())?;
    let size = tree.size().to_int_size().scale_by(PNG_SCALE).ok_or("the chart has no size")?;
    let mut pixmap = tiny_skia::Pixmap::new(size.width(), size.height()).ok_or("the chart has no size")?;
    resvg::render(&tree, tiny_skia::Transform::from_scale(PNG_SCALE, PNG_SCALE), &mut pixmap.as_mut());
    pixmap.encode_png().map_err(|e| e.to_string())
}

/// Most points a default step gives.
pub const DEFAULT_POINTS: i64 = 120;
/// How far back unless told.
pub const DEFAULT_SINCE: &str = "24h";

/// `report` options.
#[derive(Debug, Args)]
pub struct ReportArgs {
    /// Server URL, e.g. http://127.0.0.1:7410; for a fleet, several URLs separated by commas, or
    /// one whose name resolves to every replica (each step summed over the replicas).
    #[arg(long, value_name = "URL[,URL...]")]
    pub server: String,
    /// Fleet: draw the sum of the replicas that answered when some do not (the footer says so).
    #[arg(long)]
    pub partial: bool,
    /// The session.
    #[arg(long, value_name = "NAME")]
    pub session: String,
    /// The file to write: .svg, or .png for the same chart as an image.
    #[arg(long, value_name = "FILE")]
    pub out: PathBuf,
    /// bleu, chrf or chrf++, or the name of an external metric the session declares (default:
    /// the session's first built-in metric).
    #[arg(long, value_name = "METRIC")]
    pub metric: Option<String>,
    /// How far back the chart reaches: 90m, 24h, 7d.
    #[arg(long, value_name = "DURATION", default_value = DEFAULT_SINCE)]
    pub since: String,
    /// One point per this long (whole minutes, or whole hours for hourly buckets).
    #[arg(long, value_name = "DURATION")]
    pub step: Option<String>,
    /// Where the chart ends, in seconds since the Unix epoch (an incident's end, say; the
    /// chart reaches --since before it) [default: now].
    #[arg(long, value_name = "UNIX_SECONDS")]
    pub until: Option<i64>,
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
    let png = match a.out.extension().and_then(|e| e.to_str()).map(str::to_ascii_lowercase).as_deref() {
        Some("svg") => false,
        Some("png") => true,
        _ => return Err(CliError::Usage(format!("--out {}: the file must end in .svg or .png (the format is taken from it)", a.out.display()))),
    };
    let span = seconds("--since", &a.since)?;
    let step = match &a.step {
        Some(s) => seconds("--step", s)?,
        None => default_step(span),
    };
    if let Some(u) = a.until.filter(|u| *u <= 0) {
        return Err(CliError::Usage(format!("--until {u}: expected seconds since the Unix epoch")));
    }
    let fleet = Fleet::parse(&a.server, Duration::ZERO, false)?;
    let rt = tokio::runtime::Builder::new_current_thread().enable_all().build().map_err(|e| CliError::Usage(format!("cannot start the runtime: {e}")))?;
    let external_name = a.metric.clone().filter(|m| !crate::metric::Metric::ALL.iter().any(|b| b.name() == m));
    let (history, config, holders, declared) = rt.block_on(async {
        let now = a.until.unwrap_or_else(|| std::time::SystemTime::now().duration_since(UNIX_EPOCH).map_or(0, |d| d.as_secs() as i64));
        let until = (now / step + 1) * step;
        let req = pb::GetHistoryRequest { session: a.session.clone(), metric: a.metric.clone().unwrap_or_default(), from_unix: until - (span + step - 1) / step * step, until_unix: until, step_seconds: step as u32, level: 0.0, with_sums: false };
        if let Some(one) = fleet.lone().await? {
            let history = get_history(&one, req).await?;
            let config = config_from_pb(history.config.as_ref()).map_err(|e| CliError::Usage(format!("server sent a bad configuration: {e}")))?;
            let declared = match &external_name {
                Some(name) => Some(declared_metric(&one, &a.session, name).await?),
                None => None,
            };
            return Ok::<_, CliError>((history, config, None, declared));
        }
        let endpoints = fleet.endpoints().await?;
        let declared = match (&external_name, endpoints.first()) {
            (Some(name), Some(e)) => Some(declared_metric(e, &a.session, name).await?),
            _ => None,
        };
        let (history, config, holders) = fleet_history(&endpoints, pb::GetHistoryRequest { with_sums: true, ..req }, a.partial).await?;
        Ok((history, config, Some(holders), declared))
    })?;
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
        bounds: declared.as_ref().map_or(SCORE_BOUNDS, |d| (d.low, d.high)),
        counted: if declared.is_some() { "values" } else { "segments" },
    };
    let segments: u64 = points.iter().map(|p| p.segments).sum();
    let counted = match &declared {
        Some(d) => format!("{segments} values of {} ({}) in these {} steps; configuration of the built-in metrics: {}", d.name, if d.lower_is_better { "lower is better" } else { "higher is better" }, points.len(), config.describe()),
        None => format!("{} segments in these {} steps; configuration: {}", segments, points.len(), config.describe()),
    };
    let footer = vec![
        counted,
        format!("reference set digest {}; written by mtgauge {}", history.refset_digest, env!("CARGO_PKG_VERSION")),
        PROXY_NOTE.to_owned(),
    ];
    let mut footer = footer;
    if let Some(h) = &holders {
        footer.insert(1, h.clone());
    }
    let svg = report_svg(&a.session, &metric, &points, &frame, &footer);
    let bytes = if png { svg_to_png(&svg).map_err(|e| CliError::Usage(format!("{}: cannot render the chart as PNG: {e}", a.out.display())))? } else { svg.into_bytes() };
    std::fs::write(&a.out, bytes).map_err(|e| CliError::Usage(format!("{}: {e}", a.out.display())))?;
    eprintln!("mtgauge report: {} points ({} with segments) written to {}", points.len(), points.iter().filter(|p| p.segments > 0).count(), a.out.display());
    Ok(())
}

/// The declaration of external metric `name` of `session` on one server.
async fn declared_metric(e: &Endpoint, session: &str, name: &str) -> Result<pb::ExternalMetric, CliError> {
    let mut client = pb::sessions_client::SessionsClient::new(e.connect()?);
    let info = client.get(pb::GetSessionRequest { name: session.to_owned() }).await.map_err(|s| ClientError::call("get session", s))?.into_inner();
    info.external.into_iter().find(|m| m.name == name).ok_or_else(|| CliError::Usage(format!("--metric {name}: session '{session}' declares no such external metric")))
}

/// Whole-message limit for history answers with replicate sums (about 46 kB a step at 200
/// replicates and the default configuration; 120 steps at 1,000 replicates stay well under it).
pub const MAX_HISTORY_MESSAGE_BYTES: usize = 256 << 20;

/// One server's history of the session.
pub(super) async fn get_history(e: &Endpoint, req: pb::GetHistoryRequest) -> Result<pb::HistoryReport, ClientError> {
    let mut client = pb::history_client::HistoryClient::new(e.connect()?).max_decoding_message_size(MAX_HISTORY_MESSAGE_BYTES);
    Ok(client.get_history(req).await.map_err(|s| ClientError::call("get history", s))?.into_inner())
}

/// The session's history over every replica: each step's integer statistics and replicate sums
/// added up (exact; never an average of scores), the score and interval derived from the sums.
/// Refused when a replica does not answer (unless `partial`) or when the replicas score the
/// session differently. Also returns a footer line naming the replicas.
pub(super) async fn fleet_history(endpoints: &[Endpoint], req: pb::GetHistoryRequest, partial: bool) -> Result<(pb::HistoryReport, ScoreConfig, String), CliError> {
    let mut answers: Vec<(String, pb::HistoryReport)> = Vec::new();
    let (mut missing, mut without) = (Vec::new(), Vec::new());
    for e in endpoints {
        let name = identify(e.clone()).await.ok().map(|id| id.replica).filter(|n| !n.is_empty()).unwrap_or_else(|| e.url.clone());
        match get_history(e, req.clone()).await {
            Ok(h) => answers.push((name, h)),
            // This replica has no such session: it counted nothing of it.
            Err(ClientError::Call { status, .. }) if status.code() == tonic::Code::NotFound => without.push(name),
            Err(err) => missing.push(format!("{} ({err})", e.url)),
        }
    }
    if !missing.is_empty() && !partial {
        return Err(CliError::Usage(format!(
            "{} of {} replicas answered; no answer from {}: a fleet history would leave out what it counted (--partial draws the sum of those that answered)",
            answers.len() + without.len(),
            endpoints.len(),
            missing.join(", ")
        )));
    }
    let Some((first_name, first)) = answers.first() else {
        return Err(CliError::Usage(format!("no replica has a session named '{}'", req.session)));
    };
    let config = config_from_pb(first.config.as_ref()).map_err(|e| CliError::Usage(format!("{first_name} sent a bad configuration: {e}")))?;
    for (name, h) in &answers {
        if h.config != first.config || h.refset_digest != first.refset_digest || h.metric != first.metric || h.step_seconds != first.step_seconds {
            return Err(CliError::Usage(format!(
                "replicas {first_name} and {name} score session '{}' differently (reference-set digest or configuration) or answered other steps: their histories do not add up",
                req.session
            )));
        }
    }
    let names: Vec<&str> = answers.iter().map(|(n, _)| n.as_str()).collect();
    let mut line = format!("fleet: {} of {} replicas answered; the session's steps summed over {}", answers.len() + without.len(), endpoints.len(), names.join(", "));
    if !missing.is_empty() {
        line += &format!(" (PARTIAL: no answer from {})", missing.join(", "));
    }
    let from_unix = answers.iter().map(|(_, h)| h.from_unix).min().unwrap_or(first.from_unix);
    let Some(metric) = crate::metric::Metric::ALL.into_iter().find(|m| m.name() == first.metric) else {
        // An external metric: each step's count, sum and squares added up, the mean and its
        // interval derived from the sums.
        let mut steps: std::collections::BTreeMap<i64, (crate::external::ExternalSums, u32)> = std::collections::BTreeMap::new();
        for (name, h) in &answers {
            for p in &h.points {
                let Some(x) = &p.external else {
                    if p.segments > 0 {
                        return Err(CliError::Usage(format!("{name} sent no sums of external metric '{}' (a server from before fleet reports of external metrics)", first.metric)));
                    }
                    continue;
                };
                let int = |v: &str| v.parse::<i128>().map_err(|_| CliError::Usage(format!("{name} sent a sum that is not an integer: '{v}'")));
                let sums = crate::external::ExternalSums { count: x.count, sum: int(&x.sum)?, squares: int(&x.squares)? };
                let e = steps.entry(p.start_unix).or_insert((crate::external::ExternalSums::default(), x.decimals));
                if e.1 != x.decimals {
                    return Err(CliError::Usage(format!("replicas keep external metric '{}' at different decimals: their histories do not add up", first.metric)));
                }
                e.0 = e.0.checked_add(&sums).map_err(|err| CliError::Usage(err.to_string()))?;
            }
        }
        let points = steps
            .into_iter()
            .map(|(start, (sums, decimals))| {
                let spec = crate::external::ExternalSpec { name: first.metric.clone(), low: f64::MIN, high: f64::MAX, higher_is_better: true, decimals };
                let p = crate::server::history::external_point(&spec, start, &sums);
                pb::HistoryPoint { start_unix: p.start, segments: p.segments, score: p.score, interval: p.interval.map(interval_to_pb), ..Default::default() }
            })
            .collect();
        return Ok((pb::HistoryReport { from_unix, points, ..first.clone() }, config, line));
    };
    let level = crate::metric::resample::DEFAULT_LEVEL;
    // Per step start: statistics, counters, replicate sums (None once a step with segments
    // came without them).
    struct Sum {
        stats: CorpusStats,
        unknown: u64,
        rejected: u64,
        sums: Option<Replicates>,
        complete: bool,
    }
    let mut steps: std::collections::BTreeMap<i64, Sum> = std::collections::BTreeMap::new();
    for (_, h) in &answers {
        for p in &h.points {
            let e = steps.entry(p.start_unix).or_insert_with(|| Sum { stats: CorpusStats::default(), unknown: 0, rejected: 0, sums: None, complete: true });
            e.stats += stats_from_pb(p.totals.as_ref().unwrap_or(&Default::default()));
            e.unknown += p.unknown;
            e.rejected += p.rejected;
            if p.segments == 0 {
                continue;
            }
            match p.sums.as_ref().and_then(|x| replicate_sums_from_pb(x, &config)) {
                Some(x) if e.complete => match &mut e.sums {
                    Some(acc) => e.complete = acc.merge(&x).is_ok(),
                    None => e.sums = Some(x),
                },
                _ => e.complete = false,
            }
        }
    }
    let points = steps
        .into_iter()
        .map(|(start, s)| pb::HistoryPoint {
            start_unix: start,
            segments: s.stats.segments,
            score: (s.stats.segments > 0).then(|| corpus_score(&s.stats, &config, metric)).flatten(),
            interval: s.sums.filter(|_| s.complete).and_then(|r| r.interval(metric, level)).map(interval_to_pb),
            unknown: s.unknown,
            rejected: s.rejected,
            ..Default::default()
        })
        .collect();
    Ok((pb::HistoryReport { from_unix, points, ..first.clone() }, config, line))
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
