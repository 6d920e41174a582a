//! `mtgauge score`: offline corpus scoring of one hypothesis file.

use std::io::{Read, Write};
use std::sync::atomic::AtomicUsize;
use std::sync::Arc;

use clap::Args;
use serde_json::{json, Value};

use super::input::{display_name, parse_refset, read_all, read_bytes, resolve_format, RefFormat};
use super::progress::{Progress, PROGRESS_MIN_SEGMENTS};
use super::{default_threads, stderr_is_terminal, CliError, ScoringArgs};
use crate::guard::{self, GuardConfig, GuardCounts, GuardScratch, GuardSetup, Verdict};
use crate::metric::resample::{self, Replicates};
use crate::metric::{CorpusStats, ScoreConfig, SegmentStats};
use crate::refs::compiled::Compiled;
use crate::refs::oneshot;
use crate::refs::{check_same_length, split_lines, InputError, RefSet};
use crate::report::{
    config_json, guard_lines, guard_setup_line, guards_json, insert_guard_setup, interval_lines, intervals_json, refset_json, segment_json, stats_json, stats_lines, verdict_json, IntervalSettings,
    RefSetSummary, PROXY_NOTE,
};

/// `score --help`: inputs, examples, how scores are computed, errors and the progress bar.
pub(super) fn long_about() -> String {
    format!(
        "\
Score a hypothesis file against reference files, offline.

References are line-aligned plain text (one --ref per reference stream; segment id = line number \
from 1) or one JSONL file of {{\"id\": ..., \"source\": ..., \"refs\": [...]}} objects (line i of the \
hypothesis file is then scored against record i). Lines end with \\n (a \\r before it is dropped).

Examples:
  mtgauge score --ref ref1.de.txt --ref ref2.de.txt --hyp hyp.de.txt
  mtgauge score --ref refs.jsonl --hyp - --metric bleu --metric chrf++ --json < hyp.de.txt
  mtgauge score --ref ref.txt --hyp hyp.txt --per-segment segments.jsonl --metric bleu:smoothing=plus-one
  mtgauge score --ref ref.txt --hyp hyp.txt --tokenizer nist-unicode --caseless --metric chrf:chars=4,beta=1
  mtgauge score --ref ref.txt --hyp hyp.txt --interval --resamples 2000 --seed 7

Corpus BLEU is computed from summed statistics (clipped n-gram matches and totals, hypothesis \
length, effective reference length), never averaged over sentences; chrF from summed per-order \
statistics. --interval adds a bootstrap percentile interval to each score: replicates that \
reweight the segments by Poisson(1) weights, a fixed function of segment id, replicate and seed \
(the same segment gets the same weights in every run). Errors (unreadable file, invalid UTF-8, line-count mismatch, malformed JSONL) print \
one line naming the file and line, exit with code 2, and print nothing on stdout.

When stderr is a terminal, inputs of {} segments or more get a progress bar there: segments \
done of the total, the rate and the time left (nothing is drawn when stderr is a pipe or a file).",
        PROGRESS_MIN_SEGMENTS,
    )
}

/// Arguments of `mtgauge score`.
#[derive(Debug, Args)]
pub struct ScoreArgs {
    /// Reference file: repeat for several reference streams, or give one .jsonl file.
    #[arg(long = "ref", value_name = "FILE", required = true)]
    pub refs: Vec<String>,
    /// Hypothesis file, one segment per line; `-` reads standard input.
    #[arg(long, value_name = "FILE")]
    pub hyp: String,
    /// How to read --ref files.
    #[arg(long, value_enum, default_value_t = RefFormat::Auto, value_name = "FORMAT")]
    pub ref_format: RefFormat,
    #[command(flatten)]
    pub scoring: ScoringArgs,
    /// Print one JSON object instead of the table.
    #[arg(long)]
    pub json: bool,
    /// Also write per-segment statistics and sentence scores as JSONL to FILE.
    #[arg(long, value_name = "FILE")]
    pub per_segment: Option<String>,
    /// Scoring threads (default: the number of CPUs). Results never depend on it.
    #[arg(long, value_name = "N")]
    pub threads: Option<usize>,
    #[command(flatten)]
    pub interval: IntervalArgs,
    #[command(flatten)]
    pub guards: GuardArgs,
}

/// Options of the reference-free guards (`--source`).
#[derive(Debug, Args)]
pub struct GuardArgs {
    /// Source file, line-aligned with the hypotheses: also check every hypothesis against its
    /// source with the reference-free guards (empty, copy, length, repetition, script, language)
    /// and report how many each flagged (JSON key `guards`; with --per-segment, each segment's
    /// verdict).
    #[arg(long, value_name = "FILE")]
    pub source: Option<String>,
    /// Target language of the hypotheses (ISO 639-1 or 639-3 code), for the script and language
    /// guards; without it they are undecided.
    #[arg(long = "target-language", value_name = "CODE", requires = "source")]
    pub target_language: Option<String>,
    /// A guard threshold as KEY=VALUE (repeatable). Without length-ratio, the expected
    /// hypothesis/source length ratio is learned from the references against the sources.
    #[arg(long = "guard-setting", value_name = "KEY=VALUE", requires = "source", help = guard_setting_help())]
    pub settings: Vec<String>,
}

fn guard_setting_help() -> String {
    format!(
        "A guard threshold as KEY=VALUE (repeatable); defaults: {}. Without length-ratio, the expected hypothesis/source length ratio is learned from the references against the sources (when the sources hold at least length-min-chars non-space characters; else the default). The report says which (JSON `length_ratio`, `length_ratio_from`: learned, setting or default) and the language vocabulary learned from the references (`language_vocabulary`: its words, or why there is none)",
        guard::settings_help()
    )
}

impl GuardArgs {
    /// The guard configuration: target language and settings; `None` without --source.
    fn config(&self) -> Result<Option<GuardConfig>, CliError> {
        if self.source.is_none() {
            return Ok(None);
        }
        let usage = |e: guard::GuardError| CliError::Usage(e.to_string());
        let mut c = GuardConfig::default();
        if let Some(code) = &self.target_language {
            c = c.with_target(code).map_err(usage)?;
        }
        for s in &self.settings {
            c.set(s).map_err(usage)?;
        }
        Ok(Some(c))
    }

    /// True when the expected length ratio was set (else it is learned).
    fn ratio_given(&self) -> bool {
        guard::sets_length_ratio(&self.settings)
    }
}

/// Guard verdicts of the hypotheses against their sources, one per line.
struct Guarded {
    config: GuardConfig,
    verdicts: Vec<Verdict>,
    /// What the guards took from the references.
    setup: GuardSetup,
}

impl Guarded {
    fn counts(&self) -> GuardCounts {
        let mut n = GuardCounts::default();
        for &v in &self.verdicts {
            n.add(v);
        }
        n
    }
}

/// Options of the bootstrap interval (`--interval`).
#[derive(Debug, Args)]
pub struct IntervalArgs {
    /// Also give each score a bootstrap confidence interval: the percentile interval over
    /// replicates that reweight the segments by Poisson(1) weights drawn from the segment id.
    #[arg(long)]
    pub interval: bool,
    /// Replicates for --interval (0: no interval).
    #[arg(long, value_name = "N", default_value_t = resample::OFFLINE_RESAMPLES, requires = "interval")]
    pub resamples: usize,
    /// Seed of the replicate weights for --interval (same seed, same weights per segment id).
    #[arg(long, value_name = "S", default_value_t = resample::DEFAULT_RESAMPLE_SEED, requires = "interval")]
    pub seed: u64,
    /// Confidence level of --interval, strictly between 0 and 1.
    #[arg(long, value_name = "L", default_value_t = resample::DEFAULT_LEVEL, requires = "interval")]
    pub level: f64,
}

impl IntervalArgs {
    /// The checked settings; `None` when no interval is asked for (or 0 replicates).
    fn settings(&self) -> Result<Option<IntervalSettings>, CliError> {
        if !self.interval || self.resamples == 0 {
            return Ok(None);
        }
        if self.resamples > resample::MAX_RESAMPLES {
            return Err(CliError::Usage(format!("--resamples must be at most {}", resample::MAX_RESAMPLES)));
        }
        if !resample::valid_level(self.level) {
            return Err(CliError::Usage("--level must be strictly between 0 and 1".into()));
        }
        Ok(Some(IntervalSettings { resamples: self.resamples, seed: self.seed, level: self.level }))
    }
}

/// The outcome of scoring a file: the compiled references and per-segment statistics.
pub struct Scored {
    /// The reference set.
    pub refs: Arc<RefSet>,
    /// The configuration used.
    pub config: ScoreConfig,
    /// Per-segment statistics, in segment order.
    pub segments: Vec<SegmentStats>,
}

impl Scored {
    /// Summed statistics.
    pub fn corpus(&self) -> CorpusStats {
        let mut c = CorpusStats::default();
        for s in &self.segments {
            c.add_segment(s);
        }
        c
    }
}

/// Compile `refs` and run `work` over `n` hypotheses with the progress bar (when `show`).
fn scoring<T: Send>(refs: Arc<RefSet>, config: ScoreConfig, n: usize, show: bool, work: impl FnOnce(&Compiled, &AtomicUsize) -> T + Send) -> T {
    let compiled = Compiled::build(refs, config);
    let done = AtomicUsize::new(0);
    Progress::new(&done, n).run(show, "scoring", || work(&compiled, &done))
}

/// Score aligned hypotheses against a reference set (what `score` does after reading files).
pub fn score_lines(refs: Arc<RefSet>, config: ScoreConfig, hyps: &[&str], threads: usize, show_progress: bool) -> Scored {
    let segments = scoring(Arc::clone(&refs), config, hyps.len(), show_progress, |c, done| c.score_aligned(hyps, threads, done));
    Scored { refs, config, segments }
}

/// Per-segment statistics of several systems' aligned hypotheses against one reference set,
/// compiled once (`compare`); one vector per system, in the order given.
pub fn score_systems(refs: Arc<RefSet>, config: ScoreConfig, systems: &[Vec<&str>], threads: usize, show_progress: bool) -> Vec<Vec<SegmentStats>> {
    let total = systems.iter().map(Vec::len).sum();
    scoring(refs, config, total, show_progress, |c, done| systems.iter().map(|hyps| c.score_aligned(hyps, threads, done)).collect())
}

/// The corpus statistics of aligned hypotheses, without keeping per-segment statistics (memory
/// is the references and the input, nothing per scored segment).
pub fn score_corpus_lines(refs: Arc<RefSet>, config: ScoreConfig, hyps: &[&str], threads: usize, show_progress: bool) -> CorpusStats {
    scoring(refs, config, hyps.len(), show_progress, |c, done| c.score_corpus(hyps, threads, done))
}

pub(super) fn run(a: ScoreArgs) -> Result<(), CliError> {
    let config = a.scoring.config()?;
    if a.threads == Some(0) {
        return Err(CliError::Usage("--threads must be at least 1".into()));
    }
    let threads = a.threads.unwrap_or_else(default_threads);
    let interval = a.interval.settings()?;
    let guard_config = a.guards.config()?;
    // An interval needs each segment's statistics, the guards each line: the Compiled path.
    let one_shot = a.per_segment.is_none()
        && interval.is_none()
        && guard_config.is_none()
        && resolve_format(&a.refs, a.ref_format) == crate::refs::RefFormat::Plain;
    let inputs = one_shot.then(|| (a.refs.iter().map(|p| Input::open(p)).collect::<Vec<_>>(), Input::open(&a.hyp)));
    let fast = inputs.as_ref().and_then(|(refs, hyp)| score_files(&config, refs, hyp, &a.hyp, threads));
    let (corpus, refs, reps, guarded) = match fast {
        Some(scored) => (scored.stats, RefSetSummary { digest: scored.digest, segments: scored.segments, references: scored.references }, None, None),
        None => {
            let (ref_inputs, hyp_input) = inputs.unzip();
            let ref_bytes = match ref_inputs {
                Some(r) => r.into_iter().zip(&a.refs).map(|(i, p)| i.into_bytes(p)).collect::<Result<Vec<_>, _>>()?,
                None => read_all(&a.refs)?,
            };
            let hyp_bytes = match hyp_input.map_or_else(|| read_bytes(&a.hyp), |h| h.into_bytes(&a.hyp)) {
                Ok(b) => b,
                // The references are parsed before the hypothesis is read: their errors come first.
                Err(e) => return Err(parse_refset(&a.refs, a.ref_format, &ref_bytes, None).err().unwrap_or(e).into()),
            };
            score_parsed(&a, config, &ref_bytes, &hyp_bytes, threads, interval, guard_config)?
        }
    };
    let reps = interval.zip(reps);
    let out = if a.json {
        let mut m = stats_json(&corpus, &config);
        let mut c = config_json(&config);
        if let Some((set, reps)) = &reps {
            intervals_json(&mut m, &mut c, reps, set);
        }
        if let Some(g) = &guarded {
            let mut v = guards_json(&g.counts(), g.config.target.map(|t| t.code));
            insert_guard_setup(&mut v, &g.setup);
            m.insert("guards".into(), v);
        }
        m.insert("refset".into(), refset_json(None, &refs));
        m.insert("config".into(), c);
        m.insert("note".into(), json!(PROXY_NOTE));
        serde_json::to_string_pretty(&Value::Object(m)).unwrap_or_default() + "\n"
    } else {
        human(&corpus, &config, &refs, reps.as_ref(), guarded.as_ref())
    };
    let mut stdout = std::io::stdout().lock();
    stdout
        .write_all(out.as_bytes())
        .and_then(|_| stdout.flush())
        .map_err(|e| CliError::Output { what: "standard output".into(), source: e })
}

/// An input of the one-shot path: a regular file, streamed (and read again should the long way
/// need it), or anything else (standard input, a pipe, what cannot be opened) read whole once,
/// for either way, as it may not be read twice.
enum Input {
    Stream(std::fs::File),
    Whole(Result<Vec<u8>, InputError>),
}

impl Input {
    fn open(path: &str) -> Input {
        if path != "-" {
            if let Ok(f) = std::fs::File::open(path) {
                if f.metadata().is_ok_and(|m| m.is_file()) {
                    return Input::Stream(f);
                }
            }
        }
        Input::Whole(read_bytes(path))
    }

    /// A reader of the input; `None` when it could not be read.
    fn reader(&self) -> Option<Box<dyn Read + Send + '_>> {
        match self {
            Input::Stream(f) => Some(Box::new(f)),
            Input::Whole(bytes) => Some(Box::new(bytes.as_ref().ok()?.as_slice())),
        }
    }

    /// The whole input (a regular file read again from `path`).
    fn into_bytes(self, path: &str) -> Result<Vec<u8>, InputError> {
        match self {
            Input::Stream(_) => read_bytes(path),
            Input::Whole(bytes) => bytes,
        }
    }
}

/// The one-shot path: line-aligned files streamed and scored chunk by chunk
/// ([`oneshot::score_readers`]). `None` when an input could not be read or is not clean (the
/// long way then words the error).
fn score_files(config: &ScoreConfig, refs: &[Input], hyp: &Input, hyp_path: &str, threads: usize) -> Option<oneshot::PlainScored> {
    let readers: Vec<_> = refs.iter().map(Input::reader).collect::<Option<_>>()?;
    let hyp_reader = hyp.reader()?;
    // The line count is only wanted for the progress bar (and only counted for a terminal).
    let total = if !stderr_is_terminal() {
        0
    } else if let Input::Whole(Ok(bytes)) = hyp {
        memchr::memchr_iter(b'\n', bytes).count()
    } else {
        std::fs::File::open(hyp_path).map_or(0, count_lines)
    };
    let show = total >= PROGRESS_MIN_SEGMENTS;
    let done = AtomicUsize::new(0);
    Progress::new(&done, total).run(show, "scoring", || oneshot::score_readers(config, readers, hyp_reader, threads, &done))
}

/// Newlines in what `r` reads (0 on a read error).
fn count_lines(mut r: impl Read) -> usize {
    let mut buf = vec![0u8; 1 << 16];
    let mut lines = 0;
    loop {
        match r.read(&mut buf) {
            Ok(0) | Err(_) => return lines,
            Ok(n) => lines += memchr::memchr_iter(b'\n', &buf[..n]).count(),
        }
    }
}

/// The long way: the reference set parsed into a [`RefSet`], compiled and scored (per-segment
/// output, JSONL references, and the wording of every input error).
/// With `interval`, also the replicate sums of the segments, keyed by segment id.
fn score_parsed(
    a: &ScoreArgs,
    config: ScoreConfig,
    ref_bytes: &[Vec<u8>],
    hyp_bytes: &[u8],
    threads: usize,
    interval: Option<IntervalSettings>,
    guard_config: Option<GuardConfig>,
) -> Result<(CorpusStats, RefSetSummary, Option<Replicates>, Option<Guarded>), CliError> {
    let refs = Arc::new(parse_refset(&a.refs, a.ref_format, ref_bytes, None)?);
    let hyp_name = display_name(&a.hyp);
    let hyps = split_lines(hyp_name, hyp_bytes)?;
    check_same_length(hyp_name, hyps.len(), display_name(&a.refs[0]), refs.len())?;
    let guarded = match (guard_config, &a.guards.source) {
        (Some(c), Some(path)) => Some(run_guards(c, a.guards.ratio_given(), path, &refs, (hyp_name, &hyps), threads)?),
        _ => None,
    };
    let show = stderr_is_terminal() && hyps.len() >= PROGRESS_MIN_SEGMENTS;
    let (corpus, reps) = match (&a.per_segment, interval) {
        (None, None) => (score_corpus_lines(Arc::clone(&refs), config, &hyps, threads, show), None),
        (path, interval) => {
            let scored = score_lines(Arc::clone(&refs), config, &hyps, threads, show);
            if let Some(path) = path {
                write_per_segment(path, &scored, guarded.as_ref())?;
            }
            let reps = interval.map(|i| {
                let keys: Vec<u64> = scored.refs.segments().take(scored.segments.len()).map(|s| resample::segment_key(s.id().as_bytes())).collect();
                resample::accumulate(&config, i.resamples, i.seed, &keys, &scored.segments, threads)
            });
            (scored.corpus(), reps)
        }
    };
    Ok((corpus, RefSetSummary::from(refs.as_ref()), reps, guarded))
}

/// Read the source file and check every hypothesis against its source line (in `threads`
/// chunks; verdicts never depend on the split), with what the guards learn from the
/// references as a daemon session does ([`GuardConfig::learn_from`]): the expected length
/// ratio of the references over their sources unless `ratio_set`, and the language vocabulary.
fn run_guards(mut config: GuardConfig, ratio_set: bool, path: &str, refs: &RefSet, (hyp_name, hyps): (&str, &[&str]), threads: usize) -> Result<Guarded, CliError> {
    let bytes = read_bytes(path)?;
    let name = display_name(path);
    let sources = split_lines(name, &bytes)?;
    check_same_length(name, sources.len(), hyp_name, hyps.len())?;
    let pairs = refs.segments().zip(&sources).flat_map(|(seg, src)| seg.refs().map(move |r| (*src, r)));
    let references: Vec<&str> = refs.segments().flat_map(|s| s.refs()).collect();
    let setup = config.learn_from(pairs, &references, ratio_set);
    let chunk = hyps.len().div_ceil(threads.max(1)).max(1);
    let verdicts = std::thread::scope(|scope| {
        let config = &config;
        let handles: Vec<_> = sources
            .chunks(chunk)
            .zip(hyps.chunks(chunk))
            .map(|(src, hyp)| {
                scope.spawn(move || {
                    let mut scratch = GuardScratch::default();
                    src.iter().zip(hyp).map(|(s, h)| guard::check(config, s, h, &mut scratch)).collect::<Vec<_>>()
                })
            })
            .collect();
        handles.into_iter().flat_map(|h| h.join().unwrap_or_default()).collect::<Vec<_>>()
    });
    Ok(Guarded { config, verdicts, setup })
}

fn write_per_segment(path: &str, scored: &Scored, guarded: Option<&Guarded>) -> Result<(), CliError> {
    let err = |e| CliError::Output { what: path.to_owned(), source: e };
    let file = std::fs::File::create(path).map_err(err)?;
    let mut w = std::io::BufWriter::new(file);
    for (i, (seg, stats)) in scored.refs.segments().zip(&scored.segments).enumerate() {
        let mut line = segment_json(seg.id(), stats, &scored.config);
        if let (Some(v), Value::Object(m)) = (guarded.and_then(|g| g.verdicts.get(i)), &mut line) {
            m.insert("guards".into(), verdict_json(*v));
        }
        let line = line.to_string();
        writeln!(w, "{line}").map_err(err)?;
    }
    w.flush().map_err(err)
}

fn human(
    corpus: &CorpusStats,
    config: &ScoreConfig,
    refs: &RefSetSummary,
    reps: Option<&(IntervalSettings, Replicates)>,
    guarded: Option<&Guarded>,
) -> String {
    let per = refs.references as f64 / refs.segments.max(1) as f64;
    let digest = crate::refs::hex(&refs.digest);
    let mut lines = vec![format!(
        "mtgauge score: {} segments, {:.2} references per segment, references {}",
        corpus.segments,
        per,
        &digest[..16]
    )];
    lines.extend(stats_lines(corpus, config, "  "));
    if let Some((set, reps)) = reps {
        lines.extend(interval_lines(reps, set, "  "));
    }
    if let Some(g) = guarded {
        lines.extend(guard_lines(&g.counts(), g.config.target.map(|t| t.code), "  "));
        lines.push(guard_setup_line(&g.setup, "    "));
    }
    lines.push(format!("  config  {}", config.describe()));
    lines.push(PROXY_NOTE.to_owned());
    lines.join("\n") + "\n"
}
