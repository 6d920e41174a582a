//! `mtgauge compare`: two systems' hypothesis files scored against the same references,
//! offline, with the difference of their scores, its paired-bootstrap interval and an
//! approximate-randomization p-value ([`crate::metric::compare`]).

use std::io::Write;
use std::sync::Arc;

use clap::Args;
use serde_json::{json, Value};

use super::input::{display_name, parse_refset, read_all, read_bytes, RefFormat};
use super::progress::PROGRESS_MIN_SEGMENTS;
use super::score::score_systems;
use super::{default_threads, stderr_is_terminal, CliError, ScoringArgs};
use crate::client::fleet::{identify, Endpoint, Fleet};
use crate::client::ClientError;
use crate::metric::SegmentStats;
use crate::metric::compare::{self, CompareSettings, Comparison, DEFAULT_TRIALS, MAX_TRIALS};
use crate::metric::resample::{self, DEFAULT_LEVEL, DEFAULT_RESAMPLE_SEED, OFFLINE_RESAMPLES};
use crate::metric::ScoreConfig;
use crate::refs::{check_same_length, split_lines};
use crate::report::{comparison_json, comparison_lines, compare_settings_json, config_json, refset_json, RefSetSummary, PROXY_NOTE};

pub(super) const LONG_ABOUT: &str = "\
Compare two systems offline: score system A's and system B's hypothesis files against the same \
references and report, per metric, both corpus scores, their difference A - B, a confidence \
interval of the difference and a p-value.

References are read as by `mtgauge score` (plain line-aligned files, one --ref per reference \
stream, or one JSONL file); each hypothesis file has one line per segment, in segment order.

The interval (paired bootstrap): each of --resamples replicates gives every segment a random \
Poisson(1) weight, the same for A and B (the weights are a function of segment id, replicate \
and --seed), recomputes both corpus scores and takes their difference; the interval is the \
central --level share of those differences. It says how much the difference could move if the \
test set were drawn again: an interval that excludes 0 means the sign of the difference is \
unlikely to be a matter of which segments happened to be in the test set.

The p-value (approximate randomization): each of --trials trials swaps A's and B's outputs of \
every segment with probability 1/2 (coins drawn from segment id, trial and --seed) and \
recomputes the difference; c counts the trials whose |A - B| is at least the observed one, and \
p = (c + 1) / (trials + 1). It is the chance of a difference at least this large if the two \
systems were interchangeable on every segment; a small p (say below 0.05) means the difference \
is unlikely to be chance alone. The smallest p that N trials can give is 1 / (N + 1).

Both concern these references and this configuration only: metrics are a proxy for quality, \
and differences are comparable only under the same tokenizer, references and configuration.

Live: with --server URL --session A --session B, a running server compares two of its sessions over the segments both `recent` windows hold (matched by segment id; a segment scored more than once counts with its latest score). Both sessions must score against the same reference-set version with the same configuration, else the server refuses with FAILED_PRECONDITION. The default replicates there are 200 (the daemon's).

External metrics (live, one server): each external metric session A declares that session B \
declares too (same decimals and direction) is compared over the items both recent windows hold, \
matched by item key (else segment id; the latest value of a key counts): both means, their \
difference A - B, its paired-bootstrap interval (the same weights, drawn from the key) and an \
approximate-randomization p-value, as above. With no key in common it says there is nothing to \
compare. Over a fleet each replica sends its external windows too; a key held by several \
replicas counts once, from the first in --server order.

A fleet: --server with several URLs (comma-separated), or a name that resolves to every \
replica. Each replica sends both sessions' recent windows (segment keys and integer \
statistics); they are joined by segment and compared here with the same engine, pairing and \
weights, so the result equals what one process holding all those segments reports. A segment \
in the windows of several replicas counts once, from the first replica in --server order that \
holds it; the report says how many were so. When a replica does not answer, compare refuses \
unless --partial is given.

Examples:
  mtgauge compare --server http://127.0.0.1:7410 --session model-v7 --session model-v8-rc
  mtgauge compare --ref ref.de.txt --hyp system-a.de.txt --hyp system-b.de.txt
  mtgauge compare --ref refs.jsonl --hyp a.txt --hyp b.txt --metric chrf++ --json
  mtgauge compare --ref ref.txt --hyp a.txt --hyp b.txt --resamples 2000 --trials 20000 --seed 7

Errors (unreadable file, invalid UTF-8, a hypothesis file with more or fewer lines than the \
references, malformed JSONL) print one line naming the file and line, exit with code 2, and \
print nothing on stdout.";

/// Arguments of `mtgauge compare`.
#[derive(Debug, Args)]
pub struct CompareArgs {
    /// Reference file: repeat for several reference streams, or give one .jsonl file.
    #[arg(long = "ref", value_name = "FILE", required_unless_present = "server")]
    pub refs: Vec<String>,
    /// Hypothesis file of system A, then (given again) of system B: --hyp A --hyp B. One line per
    /// segment; `-` reads standard input (for one of the two).
    #[arg(long = "hyp", value_name = "FILE", required_unless_present = "server")]
    pub hyps: Vec<String>,
    /// Compare two sessions of a running server instead of files, e.g. http://127.0.0.1:7410;
    /// for a fleet, several URLs separated by commas, or one whose name resolves to every replica.
    #[arg(long, value_name = "URL[,URL...]", conflicts_with_all = ["refs", "hyps"], requires = "sessions")]
    pub server: Option<String>,
    /// With --server: session A, then (given again) session B.
    #[arg(long = "session", value_name = "NAME", requires = "server")]
    pub sessions: Vec<String>,
    /// Fleet: compare what the replicas that answered hold when some do not (marked partial).
    #[arg(long, requires = "server")]
    pub partial: bool,
    /// How to read --ref files.
    #[arg(long, value_enum, default_value_t = RefFormat::Auto, value_name = "FORMAT")]
    pub ref_format: RefFormat,
    #[command(flatten)]
    pub scoring: ScoringArgs,
    /// Print one JSON object instead of the table.
    #[arg(long)]
    pub json: bool,
    /// Threads for scoring, replicates and trials (default: the number of CPUs). Results never
    /// depend on it.
    #[arg(long, value_name = "N")]
    pub threads: Option<usize>,
    /// Bootstrap replicates for the interval of the difference (0: no interval) [default: 1000
    /// offline, 200 with --server].
    #[arg(long, value_name = "N")]
    pub resamples: Option<usize>,
    /// Randomization trials for the p-value (0: no p-value).
    #[arg(long, value_name = "N", default_value_t = DEFAULT_TRIALS)]
    pub trials: usize,
    /// Seed of the bootstrap weights and of the swap coins (same seed, same result).
    #[arg(long, value_name = "S", default_value_t = DEFAULT_RESAMPLE_SEED)]
    pub seed: u64,
    /// Confidence level of the intervals, strictly between 0 and 1.
    #[arg(long, value_name = "L", default_value_t = DEFAULT_LEVEL)]
    pub level: f64,
}

impl CompareArgs {
    fn settings(&self) -> Result<CompareSettings, CliError> {
        let default = if self.server.is_some() { resample::DAEMON_RESAMPLES } else { OFFLINE_RESAMPLES };
        let resamples = self.resamples.unwrap_or(default);
        if resamples > resample::MAX_RESAMPLES {
            return Err(CliError::Usage(format!("--resamples must be at most {}", resample::MAX_RESAMPLES)));
        }
        if self.trials > MAX_TRIALS {
            return Err(CliError::Usage(format!("--trials must be at most {MAX_TRIALS}")));
        }
        if !resample::valid_level(self.level) {
            return Err(CliError::Usage("--level must be strictly between 0 and 1".into()));
        }
        Ok(CompareSettings { resamples, seed: self.seed, level: self.level, trials: self.trials })
    }
}

pub(super) fn run(a: CompareArgs) -> Result<(), CliError> {
    if let Some(server) = &a.server {
        return live(&a, server);
    }
    let config = a.scoring.config()?;
    if a.hyps.len() != 2 {
        return Err(CliError::Usage(format!("give --hyp exactly twice (system A, then system B); got {}", a.hyps.len())));
    }
    if a.hyps.iter().all(|h| h == "-") {
        return Err(CliError::Usage("standard input (-) can be only one of the two --hyp files".into()));
    }
    if a.threads == Some(0) {
        return Err(CliError::Usage("--threads must be at least 1".into()));
    }
    let threads = a.threads.unwrap_or_else(default_threads);
    let settings = a.settings()?;
    let ref_bytes = read_all(&a.refs)?;
    // The references are parsed before the hypotheses are read: their errors come first.
    let refs = Arc::new(parse_refset(&a.refs, a.ref_format, &ref_bytes, None)?);
    let hyp_bytes = a.hyps.iter().map(|p| read_bytes(p)).collect::<Result<Vec<_>, _>>()?;
    let mut systems = Vec::with_capacity(2);
    for (path, bytes) in a.hyps.iter().zip(&hyp_bytes) {
        let name = display_name(path);
        let lines = split_lines(name, bytes)?;
        check_same_length(name, lines.len(), display_name(&a.refs[0]), refs.len())?;
        systems.push(lines);
    }
    let show = stderr_is_terminal() && refs.len() >= PROGRESS_MIN_SEGMENTS;
    let stats = score_systems(Arc::clone(&refs), config, &systems, threads, show);
    let keys: Vec<u64> = refs.segments().map(|s| resample::segment_key(s.id().as_bytes())).collect();
    let result = compare::compare(&config, &keys, &stats[0], &stats[1], &settings, threads);
    let summary = RefSetSummary::from(refs.as_ref());
    let out = if a.json { json_view(&result, &config, &summary, &a.hyps) } else { human(&result, &config, &summary, &a.hyps) };
    let mut stdout = std::io::stdout().lock();
    stdout
        .write_all(out.as_bytes())
        .and_then(|_| stdout.flush())
        .map_err(|e| CliError::Output { what: "standard output".into(), source: e })
}

/// `compare --server`: the server compares two of its sessions.
fn live(a: &CompareArgs, server: &str) -> Result<(), CliError> {
    if a.sessions.len() != 2 {
        return Err(CliError::Usage(format!("give --session exactly twice (session A, then session B); got {}", a.sessions.len())));
    }
    let settings = a.settings()?;
    let fleet = Fleet::parse(server, std::time::Duration::ZERO, false)?;
    let rt = tokio::runtime::Builder::new_current_thread().enable_all().build().map_err(|e| CliError::Usage(format!("cannot start the runtime: {e}")))?;
    let (report, fleet_view) = rt.block_on(async {
        let Some(one) = fleet.lone().await? else {
            let endpoints = fleet.endpoints().await?;
            let (report, view) = fleet_compare(&endpoints, &a.sessions, &settings, a.threads.unwrap_or_else(default_threads), a.partial).await?;
            return Ok::<_, CliError>((report, Some(view)));
        };
        let ch = one.connect()?;
        let req = crate::pb::CompareRequest {
            session_a: a.sessions[0].clone(),
            session_b: a.sessions[1].clone(),
            level: settings.level,
            resamples: Some(settings.resamples as u32),
            trials: Some(settings.trials as u32),
            seed: Some(settings.seed),
        };
        let r = crate::pb::scoring_client::ScoringClient::new(ch).compare(req).await.map_err(|s| crate::client::ClientError::call("compare", s))?;
        Ok((r.into_inner(), None))
    })?;
    let config = crate::pb::convert::config_from_pb(report.config.as_ref()).map_err(|e| CliError::Usage(format!("server sent a bad configuration: {e}")))?;
    let result = comparison_from_pb(&report);
    let out = if a.json {
        let mut m = comparison_json(&result);
        m.insert("sessions".into(), json!({"a": report.session_a, "b": report.session_b}));
        m.insert("recent".into(), json!({"a": report.recent_a, "b": report.recent_b}));
        m.insert("refset".into(), json!({"digest": report.refset_digest}));
        let mut c = config_json(&config);
        if let Value::Object(o) = &mut c {
            o.insert("comparison".into(), compare_settings_json(&result.settings));
        }
        m.insert("config".into(), c);
        m.insert("unix_time".into(), json!(report.unix_time));
        m.insert("external".into(), external_json(&report.external));
        if let Some(f) = &fleet_view {
            m.insert("fleet".into(), f.json.clone());
        }
        m.insert("note".into(), json!(PROXY_NOTE));
        serde_json::to_string_pretty(&Value::Object(m)).unwrap_or_default() + "\n"
    } else {
        let mut lines = vec![
            format!(
                "mtgauge compare: {} segments in both recent windows ({} in A's, {} in B's), references {}",
                report.segments,
                report.recent_a,
                report.recent_b,
                &report.refset_digest[..16.min(report.refset_digest.len())]
            ),
            format!("  A = session {}", report.session_a),
            format!("  B = session {}", report.session_b),
        ];
        if let Some(f) = &fleet_view {
            lines.insert(1, format!("  {}", f.line));
        }
        lines.extend(comparison_lines(&result, "  "));
        lines.extend(external_lines(&report.external, "  "));
        lines.push(format!("  config  {}", config.describe()));
        lines.push(PROXY_NOTE.to_owned());
        lines.join("\n") + "\n"
    };
    let mut stdout = std::io::stdout().lock();
    stdout.write_all(out.as_bytes()).and_then(|_| stdout.flush()).map_err(|e| CliError::Output { what: "standard output".into(), source: e })
}

/// The external metrics of a live comparison as JSON: per metric, the items compared, both
/// means with their intervals, the difference with its interval and p-value, or the note why
/// there is none.
fn external_json(ext: &[crate::pb::ExternalComparison]) -> Value {
    let iv = |i: &Option<crate::pb::Interval>| i.as_ref().map(|i| json!({"level": i.level, "low": i.low, "high": i.high, "resamples": i.resamples, "method": i.method, "seed": i.seed}));
    Value::Array(
        ext.iter()
            .map(|e| {
                json!({
                    "metric": e.metric, "items": e.items,
                    "a": {"mean": e.a, "interval": iv(&e.a_interval)},
                    "b": {"mean": e.b, "interval": iv(&e.b_interval)},
                    "difference": e.difference, "interval": iv(&e.interval),
                    "p_value": e.p_value, "trials": e.trials, "extreme_trials": e.extreme_trials,
                    "better": if e.lower_is_better { "lower" } else { "higher" },
                    "decimals": e.decimals,
                    "note": (!e.note.is_empty()).then_some(&e.note),
                })
            })
            .collect(),
    )
}

/// Human lines of the external metrics of a live comparison (none when no session declares
/// any), each starting with `indent`.
fn external_lines(ext: &[crate::pb::ExternalComparison], indent: &str) -> Vec<String> {
    if ext.is_empty() {
        return Vec::new();
    }
    let mut out = vec![format!("{indent}external metrics: mean over the items both recent windows hold, matched by item key (else segment id)")];
    for e in ext {
        let d = e.decimals.min(6) as usize;
        let (Some(a), Some(b), Some(diff)) = (e.a, e.b, e.difference) else {
            out.push(format!("{indent}  {:<12}{}", e.metric, e.note));
            continue;
        };
        let signed = |x: f64| if x.abs() < 0.5 * 10f64.powi(-(d as i32)) { format!("{:.d$}", 0.0) } else { format!("{x:+.d$}") };
        let interval = e.interval.as_ref().map_or_else(String::new, |i| format!(", interval {} .. {}", signed(i.low), signed(i.high)));
        let p = e.p_value.map_or_else(String::new, |p| format!(", p-value {p:.4}"));
        let better = if e.lower_is_better { "lower" } else { "higher" };
        out.push(format!("{indent}  {:<12}A {a:.d$}  B {b:.d$}  A - B {}{interval}{p}; {} items, {better} is better", e.metric, signed(diff), e.items));
    }
    out
}

/// One session's external window values gathered from replicas: per metric (in the order first
/// seen), its spec and per key its value, keys in the order first seen.
#[derive(Default)]
struct FleetExternal {
    metrics: Vec<(crate::external::ExternalSpec, std::collections::HashMap<u64, i64>, Vec<u64>)>,
}

impl FleetExternal {
    /// The slot of `spec`'s metric; a metric declared otherwise than before is refused.
    fn slot(&mut self, spec: crate::external::ExternalSpec) -> Result<usize, String> {
        match self.metrics.iter().position(|(s, _, _)| s.name == spec.name) {
            Some(i) if (self.metrics[i].0.decimals, self.metrics[i].0.higher_is_better) != (spec.decimals, spec.higher_is_better) => Err(format!("external metric '{}' is declared otherwise than on another replica", spec.name)),
            Some(i) => Ok(i),
            None => {
                self.metrics.push((spec, Default::default(), Vec::new()));
                Ok(self.metrics.len() - 1)
            }
        }
    }

    /// Take in one part of one replica's window values (keys not yet held).
    fn add(&mut self, part: &crate::pb::ExternalWindowValues) -> Result<(), String> {
        let spec = part.metric.as_ref().ok_or("an external window chunk without its metric")?;
        let spec = crate::pb::external::spec_from_pb(spec).map_err(|e| e.0)?;
        if part.keys.len() != part.values.len() {
            return Err(format!("external window chunk of {} keys and {} values", part.keys.len(), part.values.len()));
        }
        let i = self.slot(spec)?;
        let (_, values, order) = &mut self.metrics[i];
        for (&k, &v) in part.keys.iter().zip(&part.values) {
            if values.insert(k, v).is_none() {
                order.push(k);
            }
        }
        Ok(())
    }

    /// Add a later replica's values: keys already held keep their value.
    fn merge(&mut self, later: FleetExternal) -> Result<(), String> {
        for (spec, values, order) in later.metrics {
            let i = self.slot(spec)?;
            let (_, mine, my_order) = &mut self.metrics[i];
            for k in order {
                if let std::collections::hash_map::Entry::Vacant(e) = mine.entry(k) {
                    e.insert(values[&k]);
                    my_order.push(k);
                }
            }
        }
        Ok(())
    }

    /// As the comparison takes them.
    fn values(self) -> crate::external::compare::WindowValues {
        self.metrics.into_iter().map(|(spec, values, order)| (spec, order.iter().map(|k| (*k, values[k])).collect())).collect()
    }
}

/// What a fleet comparison adds to the report: which replicas answered, in words and JSON.
struct FleetView {
    line: String,
    json: Value,
}

/// Whole-message limit for window chunks (each about 280 kB at most).
const MAX_CHUNK_BYTES: usize = 16 << 20;

/// Compare two sessions over a fleet: every replica streams both sessions' `recent` windows
/// (RecentSegments), the windows are joined by segment key and compared here with the same
/// engine, pairing and weights the daemon's Compare uses, so a fleet whose replicas hold
/// different segments gives what one process holding all of them gives. A segment in more
/// than one replica's window of a session counts once, with the statistics of the first
/// replica in `--server` order that holds it (replicas share no clock to say which score is
/// the latest); the report says how many were so.
async fn fleet_compare(endpoints: &[Endpoint], sessions: &[String], settings: &CompareSettings, threads: usize, partial: bool) -> Result<(crate::pb::CompareReport, FleetView), CliError> {
    use crate::pb::scoring_client::ScoringClient;
    let mut windows: [std::collections::HashMap<u64, SegmentStats>; 2] = Default::default();
    let mut order: [Vec<u64>; 2] = Default::default();
    let (mut held, mut on_several) = ([0usize; 2], [0usize; 2]);
    let mut head: Option<(String, crate::pb::SegmentChunk)> = None;
    let mut present = [false; 2];
    let mut external: [FleetExternal; 2] = Default::default();
    let (mut answered, mut missing) = (Vec::new(), Vec::new());
    'replicas: for e in endpoints {
        let name = identify(e.clone()).await.ok().map(|id| id.replica).filter(|n| !n.is_empty()).unwrap_or_else(|| e.url.clone());
        let mut got: [Vec<crate::pb::SegmentChunk>; 2] = Default::default();
        for (i, session) in sessions.iter().enumerate() {
            let mut client = match e.connect() {
                Ok(c) => ScoringClient::new(c).max_decoding_message_size(MAX_CHUNK_BYTES),
                Err(err) => {
                    missing.push(format!("{} ({err})", e.url));
                    continue 'replicas;
                }
            };
            let call = client.recent_segments(crate::pb::RecentSegmentsRequest { session: session.clone() }).await;
            let mut stream = match call {
                Ok(s) => s.into_inner(),
                // This replica has no such session: it holds none of its segments.
                Err(s) if s.code() == tonic::Code::NotFound => continue,
                Err(s) => {
                    missing.push(format!("{} ({})", e.url, ClientError::call("recent segments", s)));
                    continue 'replicas;
                }
            };
            present[i] = true;
            loop {
                match stream.message().await {
                    Ok(Some(c)) => got[i].push(c),
                    Ok(None) => break,
                    Err(s) => {
                        missing.push(format!("{} ({})", e.url, ClientError::call("recent segments", s)));
                        continue 'replicas;
                    }
                }
            }
        }
        for (i, chunks) in got.iter().enumerate() {
            for c in chunks {
                match &head {
                    None => head = Some((format!("{name}'s session '{}'", c.session), c.clone())),
                    Some((first, h)) => {
                        if c.refset_digest != h.refset_digest || c.config != h.config || c.width != h.width {
                            return Err(CliError::Usage(format!(
                                "{first} and {name}'s session '{}' score against different reference-set versions or configurations: their segments cannot be paired",
                                c.session
                            )));
                        }
                    }
                }
                let config = crate::pb::convert::config_from_pb(c.config.as_ref()).map_err(|err| CliError::Usage(format!("{name} sent a bad configuration: {err}")))?;
                let layout = crate::metric::layout::Layout::new(&config);
                let width = layout.width();
                if width != c.width as usize || c.fields.len() != c.keys.len() * width {
                    return Err(CliError::Usage(format!("{name} sent a window chunk of {} values for {} segments of width {}", c.fields.len(), c.keys.len(), c.width)));
                }
                for (k, row) in c.keys.iter().zip(c.fields.chunks(width.max(1))) {
                    held[i] += 1;
                    if windows[i].contains_key(k) {
                        on_several[i] += 1;
                    } else {
                        windows[i].insert(*k, layout.decode(row));
                        order[i].push(*k);
                    }
                }
            }
        }
        // External values: a key counts once per session, from the first replica holding it.
        for (i, chunks) in got.iter().enumerate() {
            let mut mine = FleetExternal::default();
            for part in chunks.iter().flat_map(|c| &c.external) {
                mine.add(part).map_err(|why| CliError::Usage(format!("{name}'s session '{}': {why}", sessions[i])))?;
            }
            external[i].merge(mine).map_err(|why| CliError::Usage(format!("{name}'s session '{}': {why}", sessions[i])))?;
        }
        answered.push(name);
    }
    if !missing.is_empty() && !partial {
        return Err(CliError::Usage(format!(
            "{} of {} replicas answered; no answer from {}: a fleet comparison would leave out the segments it holds (--partial compares what those that answered hold)",
            answered.len(),
            endpoints.len(),
            missing.join(", ")
        )));
    }
    let Some((_, h)) = head else {
        return Err(CliError::Usage(format!("no replica holds a session named '{}' or '{}'", sessions[0], sessions[1])));
    };
    if let Some(i) = (0..2).find(|&i| !present[i]) {
        return Err(CliError::Usage(format!("no replica has a session named '{}'", sessions[i])));
    }
    let config = crate::pb::convert::config_from_pb(h.config.as_ref()).map_err(|err| CliError::Usage(format!("bad configuration: {err}")))?;
    let (mut keys, mut sa, mut sb) = (Vec::new(), Vec::new(), Vec::new());
    for k in &order[0] {
        if let Some(t) = windows[1].get(k) {
            keys.push(*k);
            sa.push(windows[0][k]);
            sb.push(*t);
        }
    }
    let threads = threads.max(1);
    let (settings, config2) = (*settings, config);
    let [ext_a, ext_b] = external.map(FleetExternal::values);
    let (c, external) = tokio::task::spawn_blocking(move || {
        let external: Vec<crate::pb::ExternalComparison> = crate::external::compare::compare_declared(&ext_a, &ext_b, &settings, threads).iter().map(|(spec, x, note)| crate::pb::external::comparison_to_pb(spec, x, note)).collect();
        (compare::compare(&config2, &keys, &sa, &sb, &settings, threads), external)
    })
    .await
    .map_err(|e| CliError::Usage(format!("comparison failed: {e}")))?;
    let unix_time = std::time::SystemTime::now().duration_since(std::time::UNIX_EPOCH).map_or(0, |d| d.as_secs() as i64);
    let report = crate::pb::CompareReport {
        session_a: sessions[0].clone(),
        session_b: sessions[1].clone(),
        refset_digest: h.refset_digest.clone(),
        config: h.config.clone(),
        segments: c.segments,
        recent_a: windows[0].len() as u64,
        recent_b: windows[1].len() as u64,
        metrics: crate::pb::convert::metric_comparisons_to_pb(&c),
        level: settings.level,
        resamples: settings.resamples as u32,
        trials: settings.trials as u32,
        seed: settings.seed,
        unix_time,
        note: PROXY_NOTE.to_owned(),
        external,
    };
    let partial_words = if missing.is_empty() { String::new() } else { format!(" (PARTIAL: no answer from {})", missing.join(", ")) };
    let line = format!(
        "fleet: {} of {} replicas answered{partial_words}; windows joined by segment ({} of A's and {} of B's segments were in more than one replica's window, counted once each)",
        answered.len(),
        endpoints.len(),
        on_several[0],
        on_several[1]
    );
    let json = json!({
        "replicas": endpoints.len(), "answered": answered, "missing": missing, "partial": !missing.is_empty(),
        "on_several_replicas": {"a": on_several[0], "b": on_several[1]},
        "held": {"a": held[0], "b": held[1]},
        "recent": "the union of the replicas' recent windows, each segment once (the first replica in --server order that holds it)",
        "external": "per metric, the union of the replicas' recent windows, each item key once (the first replica in --server order that holds it)",
    });
    Ok((report, FleetView { line, json }))
}

/// A server's comparison as the engine's (for the shared renderings).
fn comparison_from_pb(r: &crate::pb::CompareReport) -> Comparison {
    use crate::pb::convert::interval_from_pb;
    let settings = CompareSettings { resamples: r.resamples as usize, seed: r.seed, level: r.level, trials: r.trials as usize };
    let metrics = r
        .metrics
        .iter()
        .filter_map(|m| {
            let metric = crate::metric::Metric::ALL.into_iter().find(|x| x.name() == m.metric)?;
            let mut interval = m.interval.as_ref().map(interval_from_pb);
            if let Some(i) = &mut interval {
                i.method = compare::DIFFERENCE_METHOD;
            }
            Some(compare::MetricComparison {
                metric,
                segments: r.segments,
                a: compare::SystemScore { score: m.a, interval: m.a_interval.as_ref().map(interval_from_pb) },
                b: compare::SystemScore { score: m.b, interval: m.b_interval.as_ref().map(interval_from_pb) },
                difference: m.difference,
                interval,
                p_value: m.p_value,
                trials: m.trials as usize,
                extreme_trials: m.extreme_trials as usize,
            })
        })
        .collect();
    Comparison { segments: r.segments, settings, metrics }
}

fn json_view(result: &Comparison, config: &ScoreConfig, refs: &RefSetSummary, hyps: &[String]) -> String {
    let mut m = comparison_json(result);
    m.insert("systems".into(), json!({"a": display_name(&hyps[0]), "b": display_name(&hyps[1])}));
    m.insert("refset".into(), refset_json(None, refs));
    let mut c = config_json(config);
    if let Value::Object(o) = &mut c {
        o.insert("comparison".into(), compare_settings_json(&result.settings));
    }
    m.insert("config".into(), c);
    m.insert("note".into(), json!(PROXY_NOTE));
    serde_json::to_string_pretty(&Value::Object(m)).unwrap_or_default() + "\n"
}

fn human(result: &Comparison, config: &ScoreConfig, refs: &RefSetSummary, hyps: &[String]) -> String {
    let per = refs.references as f64 / refs.segments.max(1) as f64;
    let digest = crate::refs::hex(&refs.digest);
    let mut lines = vec![
        format!("mtgauge compare: {} segments, {:.2} references per segment, references {}", result.segments, per, &digest[..16]),
        format!("  A = {}", display_name(&hyps[0])),
        format!("  B = {}", display_name(&hyps[1])),
    ];
    lines.extend(comparison_lines(result, "  "));
    lines.push(format!("  config  {}", config.describe()));
    lines.push(PROXY_NOTE.to_owned());
    lines.join("\n") + "\n"
}
