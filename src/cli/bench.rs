//! `mtgauge bench`: scoring speed on a generated corpus, with ratios against baselines measured in
//! the same run (a plain hash-map BLEU written the obvious way, and optionally NLTK's
//! `corpus_bleu` run by a given Python interpreter). Prints figures; asserts nothing about time.

use std::collections::HashMap;
use std::io::Write;
use std::path::PathBuf;
use std::sync::atomic::AtomicUsize;
use std::sync::Arc;
use std::time::Instant;

use clap::Args;
use serde_json::{json, Value};

use super::demo::corpus::{generate, refset, Corpus};
use super::{default_threads, CliError};
use crate::metric::{BleuStats, MetricSpec, ScoreConfig, DEFAULT_CHRFPP_WORD_ORDER, DEFAULT_CHRF_CHAR_ORDER};
use crate::metric::resample;
use crate::metric::SegmentStats;
use crate::refs::compiled::{Compiled, Scratch};
use crate::text::Tokenizer;

/// Segments in the generated corpus unless told.
pub const DEFAULT_BENCH_SEGMENTS: usize = 100_000;
/// Mean segment length in tokens unless told.
pub const DEFAULT_BENCH_TOKENS: usize = 25;
/// Vocabulary size of the generated corpus unless told.
pub const DEFAULT_BENCH_VOCAB: usize = 20_000;
/// The outside baselines run with `--baseline-python` (NLTK's corpus_bleu; a plain chrF).
const BASELINE_SCRIPT: &str = include_str!("bench_baselines.py");
/// Replicate counts whose cost `bench` measures: the daemon's and the offline default.
const BENCH_RESAMPLES: [usize; 2] = [resample::DAEMON_RESAMPLES, resample::OFFLINE_RESAMPLES];
/// Passes of each replicate-cost measurement (the fastest counts).
const REPLICATE_PASSES: usize = 3;
/// Corpus segments the replicate cost is measured on (at most).
const REPLICATE_SEGMENTS: usize = 20_000;
/// Runs of each end-to-end `mtgauge score` measurement (the fastest counts).
const END_TO_END_RUNS: usize = 3;
/// The chrF-family metrics the end-to-end rows time, with the orders the Python baseline gets.
const END_TO_END_CHRF: [(&str, usize, usize); 2] = [("chrf", DEFAULT_CHRF_CHAR_ORDER, 0), ("chrf++", DEFAULT_CHRF_CHAR_ORDER, DEFAULT_CHRFPP_WORD_ORDER)];

pub(super) const LONG_ABOUT: &str = "\
Measure scoring speed on a generated corpus (Zipf-distributed words, one reference, hypotheses \
made by replacing, dropping and inserting words) and print ratios against baselines measured in \
the same run. Nothing is asserted on time; figures vary with the machine and its load.

Rows:
  reference set build, BLEU tables
      building the reference set in memory, then the BLEU tables the daemon keeps for it.
  BLEU / chrF / chrF++ ... segments/s
      the scoring loop alone, inside this process: references compiled beforehand, hypotheses \
already split into lines in memory (on 1 thread, and for BLEU also on --threads threads).
  baseline: hash-map BLEU
      the same statistics computed the obvious way (hash maps of n-gram vectors per segment), \
in this process; the ratio is the 1-thread BLEU loop over it.
  baseline: NLTK corpus_bleu (with --baseline-python)
      NLTK's corpus_bleu over token lists already split (timed inside Python, scoring only); \
the ratios are the BLEU loop over it.
  end to end
      the whole `mtgauge score --tokenizer whitespace --json` command on the corpus written to \
files, as a user runs it: a new process (start, reading the files, scoring, digest, printing), \
the fastest and slowest of 3 runs on --threads threads. With --baseline-python, beside it the \
baseline script reading the same files, splitting the lines and scoring (NLTK corpus_bleu for \
BLEU, a plain Python chrF / chrF++; interpreter start and imports not counted), and the ratio of \
that time over the fastest run (and over the slowest).
  bootstrap replicates
      the 1-thread BLEU+chrF scoring loop on up to 20,000 segments, alone and with every segment \
also added to R replicate sums (R = 200, the daemon's, and 1000, `score --interval`'s default), as \
segments/s and as the ratio of the time with replicates over the time alone.
  guards
      a session's 1-thread BLEU loop over the demo scenario's 900 (source, hypothesis) items by \
segment id, in batches of 100 as the daemon takes them, alone and with every item of a batch \
then checked by the reference-free guards (German target, the language vocabulary learned from \
the references; and with language-vocab-share=off, every item's language to the identifiers, \
and with language-id=off, which keeps the script check), as segments/s and the time the guards add; \
with the scan path this processor takes (sixteen-byte on x86-64 with SSSE3, POPCNT, BMI1, BMI2 \
and LZCNT, else eight-byte; the same results).
  external metrics
      the same loop with every item also carrying two external values (a 0-1 score with four \
decimals, a lower-is-better rate with two), checked, converted to fixed point and summed per \
batch of 64, without and with the daemon's 200 bootstrap replicates: segments/s and the \
microseconds the values add to an item.
  language identifiers
      the two identifiers the language guard uses (whatlang 0.18.0, the thorough one; whichlang \
0.1.1, the fast screen) on the demo's German hypotheses and English sources: microseconds per \
text and the share each names correctly (whatlang's also reliable and correct).
  memory per segment
      bytes the reference set and the compiled tables keep per segment (1 and 2 references).";

/// Arguments of `mtgauge bench`.
#[derive(Debug, Args)]
pub struct BenchArgs {
    /// Segments in the generated corpus.
    #[arg(long, default_value_t = DEFAULT_BENCH_SEGMENTS, value_name = "N")]
    pub segments: usize,
    /// Mean tokens per segment (lengths vary from half to one and a half times this).
    #[arg(long, default_value_t = DEFAULT_BENCH_TOKENS, value_name = "N")]
    pub tokens: usize,
    /// Vocabulary size (Zipf-distributed).
    #[arg(long, default_value_t = DEFAULT_BENCH_VOCAB, value_name = "N")]
    pub vocab: usize,
    /// Seed of the corpus generator.
    #[arg(long, default_value_t = 7)]
    pub seed: u64,
    /// Threads for the parallel measurement (default: the number of CPUs).
    #[arg(long, value_name = "N")]
    pub threads: Option<usize>,
    /// Python interpreter with nltk installed: also time NLTK's corpus_bleu on the same corpus.
    #[arg(long, value_name = "PYTHON")]
    pub baseline_python: Option<PathBuf>,
    /// Print the figures as one JSON object.
    #[arg(long)]
    pub json: bool,
}

/// BLEU statistics the obvious way: hash maps of n-gram vectors per segment. The baseline.
fn naive_bleu(c: &Corpus, order: usize) -> BleuStats {
    let mut st = BleuStats::default();
    for (refs, hyp) in c.refs.iter().zip(&c.hyps) {
        let h: Vec<&str> = hyp.split_whitespace().collect();
        let rs: Vec<Vec<&str>> = refs.iter().map(|r| r.split_whitespace().collect()).collect();
        for n in 1..=order {
            fn count<'a>(t: &[&'a str], n: usize) -> HashMap<Vec<&'a str>, u64> {
                let mut m: HashMap<Vec<&str>, u64> = HashMap::new();
                for g in t.windows(n) {
                    *m.entry(g.to_vec()).or_default() += 1;
                }
                m
            }
            let hc = count(&h, n);
            let mut max: HashMap<Vec<&str>, u64> = HashMap::new();
            for r in &rs {
                for (g, k) in count(r, n) {
                    let e = max.entry(g).or_default();
                    *e = (*e).max(k);
                }
            }
            st.matches[n - 1] += hc.iter().map(|(g, &k)| k.min(*max.get(g).unwrap_or(&0))).sum::<u64>();
            st.totals[n - 1] += hc.values().sum::<u64>();
        }
        st.hyp_len += h.len() as u64;
        st.ref_len += crate::metric::RefLength::Closest.pick(h.len() as u64, rs.iter().map(|r| r.len() as u64));
    }
    st
}

fn time<T>(f: impl FnOnce() -> T) -> (T, f64) {
    let t = Instant::now();
    let out = f();
    (out, t.elapsed().as_secs_f64())
}

fn config(metrics: &str, tokenizer: Tokenizer) -> ScoreConfig {
    let specs = metrics.split_whitespace().map(|m| m.parse::<MetricSpec>().expect("fixed metric spec"));
    ScoreConfig::new(tokenizer, false, specs).expect("fixed configuration")
}

/// Throughput of `compiled` over the corpus on `threads` threads; (segments/s, corpus stats).
fn throughput(compiled: &Compiled, hyps: &[&str], threads: usize) -> (f64, crate::metric::CorpusStats) {
    let done = AtomicUsize::new(0);
    let (corpus, secs) = time(|| compiled.score_corpus(hyps, threads, &done));
    (hyps.len() as f64 / secs, corpus)
}

/// What bootstrap replicates cost on top of scoring: segments/s of the 1-thread scoring loop
/// of `compiled` over the corpus, alone and with every segment also added to R replicate sums
/// (as `score --interval` and, later, a session add it), for each R of
/// [`BENCH_RESAMPLES`]; the fastest of [`REPLICATE_PASSES`] passes counts.
fn replicate_cost(compiled: &Compiled, config: &ScoreConfig, hyps: &[&str]) -> (f64, Vec<(usize, f64)>) {
    let keys: Vec<u64> = compiled.refs().segments().map(|s| resample::segment_key(s.id().as_bytes())).collect();
    let best = |f: &mut dyn FnMut()| (0..REPLICATE_PASSES).map(|_| time(&mut *f).1).fold(f64::INFINITY, f64::min);
    let mut sink = 0u64;
    let alone = best(&mut || {
        let (mut scratch, mut one) = (Scratch::default(), SegmentStats::default());
        for (i, h) in hyps.iter().enumerate() {
            compiled.score_segment_into(i, h, &mut scratch, &mut one);
            sink = sink.wrapping_add(one.bleu.hyp_len);
        }
    });
    let with: Vec<(usize, f64)> = BENCH_RESAMPLES
        .iter()
        .map(|&r| {
            let secs = best(&mut || {
                let (mut scratch, mut one) = (Scratch::default(), SegmentStats::default());
                let mut reps = resample::Replicates::new(config, r, resample::DEFAULT_RESAMPLE_SEED);
                for (i, h) in hyps.iter().enumerate() {
                    compiled.score_segment_into(i, h, &mut scratch, &mut one);
                    reps.add(keys[i], &one);
                }
                sink = sink.wrapping_add(reps.replicate(0).segments);
            });
            (r, hyps.len() as f64 / secs)
        })
        .collect();
    std::hint::black_box(sink);
    (hyps.len() as f64 / alone, with)
}

/// The generated corpus written as line-aligned files (one reference) in a directory of its own,
/// removed when dropped.
struct CorpusFiles {
    dir: PathBuf,
    refs: PathBuf,
    hyps: PathBuf,
}

impl CorpusFiles {
    fn write(c: &Corpus) -> Result<CorpusFiles, CliError> {
        let dir = std::env::temp_dir().join(format!("mtgauge-bench-{}", std::process::id()));
        let io = |e| CliError::Output { what: dir.display().to_string(), source: e };
        std::fs::create_dir_all(&dir).map_err(io)?;
        let write = |name: &str, lines: &mut dyn Iterator<Item = &str>| -> Result<PathBuf, CliError> {
            let p = dir.join(name);
            let mut w = std::io::BufWriter::new(std::fs::File::create(&p).map_err(io)?);
            for l in lines {
                writeln!(w, "{l}").map_err(io)?;
            }
            w.flush().map_err(io)?;
            Ok(p)
        };
        let refs = write("ref.txt", &mut c.refs.iter().map(|r| r[0].as_str()))?;
        let hyps = write("hyp.txt", &mut c.hyps.iter().map(String::as_str))?;
        Ok(CorpusFiles { dir, refs, hyps })
    }
}

impl Drop for CorpusFiles {
    fn drop(&mut self) {
        let _ = std::fs::remove_dir_all(&self.dir);
    }
}

/// Run the baseline script in `mode` with `args` after the two file names; its JSON object.
fn run_baseline(python: &PathBuf, files: &CorpusFiles, mode: &str, args: &[String]) -> Result<Value, CliError> {
    let script = files.dir.join("bench_baselines.py");
    std::fs::write(&script, BASELINE_SCRIPT).map_err(|e| CliError::Output { what: script.display().to_string(), source: e })?;
    let out = std::process::Command::new(python)
        .arg(&script)
        .arg(mode)
        .arg(&files.refs)
        .arg(&files.hyps)
        .args(args)
        .output()
        .map_err(|e| CliError::Usage(format!("cannot run {}: {e}", python.display())))?;
    if !out.status.success() {
        return Err(CliError::Usage(format!("{mode} baseline failed: {}", String::from_utf8_lossy(&out.stderr).trim())));
    }
    serde_json::from_slice(&out.stdout).map_err(|e| CliError::Usage(format!("{mode} baseline printed no JSON: {e}")))
}

/// The whole `mtgauge score` command on the files, as a user runs it (this executable, a new
/// process each run, output read back): the fastest and the slowest of [`END_TO_END_RUNS`] wall
/// times and the JSON it printed.
fn end_to_end(files: &CorpusFiles, metric: &str, threads: usize) -> Result<(f64, f64, Value), CliError> {
    let exe = std::env::current_exe().map_err(|e| CliError::Usage(format!("cannot find this executable: {e}")))?;
    let mut best = f64::INFINITY;
    let mut worst: f64 = 0.0;
    let mut printed = Value::Null;
    for _ in 0..END_TO_END_RUNS {
        let (out, secs) = time(|| {
            std::process::Command::new(&exe)
                .args(["score", "--tokenizer", "whitespace", "--json", "--metric", metric, "--threads", &threads.to_string(), "--ref"])
                .arg(&files.refs)
                .arg("--hyp")
                .arg(&files.hyps)
                .stdin(std::process::Stdio::null())
                .output()
        });
        let out = out.map_err(|e| CliError::Usage(format!("cannot run {}: {e}", exe.display())))?;
        if !out.status.success() {
            return Err(CliError::Usage(format!("mtgauge score failed: {}", String::from_utf8_lossy(&out.stderr).trim())));
        }
        best = best.min(secs);
        worst = worst.max(secs);
        printed = serde_json::from_slice(&out.stdout).map_err(|e| CliError::Usage(format!("mtgauge score printed no JSON: {e}")))?;
    }
    Ok((best, worst, printed))
}

pub(super) fn run(a: BenchArgs) -> Result<(), CliError> {
    if a.segments == 0 || a.tokens == 0 || a.vocab == 0 {
        return Err(CliError::Usage("--segments, --tokens and --vocab must be at least 1".into()));
    }
    let threads = a.threads.unwrap_or_else(default_threads).max(1);
    let log = |s: String| {
        if !a.json {
            eprintln!("{s}");
        }
    };
    log(format!("generating {} segments (~{} tokens, Zipf vocabulary of {})", a.segments, a.tokens, a.vocab));
    let corpus = generate(a.segments, a.tokens, a.vocab, 1, a.seed);
    let hyps: Vec<&str> = corpus.hyps.iter().map(String::as_str).collect();

    let (set, build_set) = time(|| Arc::new(refset(&corpus)));
    let bleu_cfg = config("bleu", Tokenizer::Whitespace);
    let (bleu, build_bleu) = time(|| Compiled::build(Arc::clone(&set), bleu_cfg));
    let (bleu_1, stats) = throughput(&bleu, &hyps, 1);
    let (bleu_n, _) = throughput(&bleu, &hyps, threads);
    let nist = Compiled::build(Arc::clone(&set), config("bleu", Tokenizer::Nist));
    let (bleu_nist_1, _) = throughput(&nist, &hyps, 1);
    let (naive_stats, naive_secs) = time(|| naive_bleu(&corpus, bleu_cfg.bleu_order()));
    if naive_stats != stats.bleu {
        return Err(CliError::Usage("internal check failed: baseline BLEU statistics differ from the engine's".into()));
    }
    let naive = a.segments as f64 / naive_secs;
    let chrf = Compiled::build(Arc::clone(&set), config("chrf", Tokenizer::Whitespace));
    let (chrf_1, _) = throughput(&chrf, &hyps, 1);
    let chrfpp = Compiled::build(Arc::clone(&set), config("chrf++", Tokenizer::Whitespace));
    let (chrfpp_1, _) = throughput(&chrfpp, &hyps, 1);

    let interval_cfg = config("bleu chrf", Tokenizer::Whitespace);
    let interval_compiled = Compiled::build(Arc::clone(&set), interval_cfg);
    let (alone, with) = replicate_cost(&interval_compiled, &interval_cfg, &hyps[..hyps.len().min(REPLICATE_SEGMENTS)]);

    // Memory per segment with two references of about `tokens` tokens each.
    let two = generate(a.segments.min(20_000), a.tokens, a.vocab, 2, a.seed ^ 1);
    let two_set = Arc::new(refset(&two));
    let two_bleu = Compiled::build(Arc::clone(&two_set), bleu_cfg);
    let per_seg = |bytes: usize, n: usize| bytes as f64 / n as f64;

    let mut figures = json!({
        "segments": a.segments,
        "mean_tokens": a.tokens,
        "threads": threads,
        "bleu": stats.bleu.score(bleu_cfg.bleu_order()).score,
        "refset_build_seconds": build_set,
        "bleu_table_build_seconds": build_bleu,
        "bleu_segments_per_s_1_thread": bleu_1,
        "bleu_segments_per_s_n_threads": bleu_n,
        "bleu_nist_tokenizer_segments_per_s_1_thread": bleu_nist_1,
        "chrf_segments_per_s_1_thread": chrf_1,
        "chrfpp_segments_per_s_1_thread": chrfpp_1,
        "baseline_hashmap_bleu_segments_per_s": naive,
        "replicates": {
            "metrics": interval_cfg.describe(),
            "segments": hyps.len().min(REPLICATE_SEGMENTS),
            "segments_per_s_alone": alone,
            "with": with.iter().map(|(r, rate)| json!({ "resamples": r, "segments_per_s": rate, "time_ratio": alone / rate })).collect::<Vec<_>>(),
        },
        "ratio_vs_hashmap_baseline_1_thread": bleu_1 / naive,
        "memory_bytes_per_segment_1_ref": {
            "refset": per_seg(set.memory_bytes(), set.len()),
            "bleu_tables": per_seg(bleu.memory_bytes(), set.len()),
            "chrf_tables": per_seg(chrf.memory_bytes(), set.len()),
            "chrfpp_tables": per_seg(chrfpp.memory_bytes(), set.len()),
        },
        "memory_bytes_per_segment_2_refs": {
            "refset": per_seg(two_set.memory_bytes(), two_set.len()),
            "bleu_tables": per_seg(two_bleu.memory_bytes(), two_set.len()),
            "total": per_seg(two_set.memory_bytes() + two_bleu.memory_bytes(), two_set.len()),
        },
    });
    log("timing the reference-free guards on the demo scenario".into());
    figures["guards"] = super::bench_guards::guard_cost();
    figures["language_identifiers"] = super::bench_guards::identifier_figures();
    log("timing external segment metrics on the demo scenario".into());
    figures["external"] = super::bench_external::external_cost();
    let files = CorpusFiles::write(&corpus)?;
    log(format!("timing the whole `mtgauge score` command on {threads} threads"));
    let (e2e_bleu, e2e_bleu_worst, printed) = end_to_end(&files, "bleu", threads)?;
    let e2e_bleu_score = printed["bleu"]["score"].as_f64().unwrap_or(f64::NAN);
    figures["end_to_end"] = json!({ "runs": END_TO_END_RUNS, "bleu_seconds": e2e_bleu, "bleu_seconds_slowest": e2e_bleu_worst, "bleu": e2e_bleu_score });
    for (metric, _, _) in END_TO_END_CHRF {
        let (secs, worst, printed) = end_to_end(&files, metric, threads)?;
        figures["end_to_end"][format!("{metric}_seconds")] = json!(secs);
        figures["end_to_end"][format!("{metric}_seconds_slowest")] = json!(worst);
        figures["end_to_end"][metric] = printed[metric]["score"].clone();
    }
    if let Some(py) = &a.baseline_python {
        log("timing NLTK corpus_bleu on the same corpus".into());
        let nltk = run_baseline(py, &files, "nltk", &[])?;
        let nltk_rate = nltk["segments"].as_f64().unwrap_or(0.0) / nltk["seconds"].as_f64().unwrap_or(f64::INFINITY);
        let nltk_bleu = 100.0 * nltk["bleu"].as_f64().unwrap_or(f64::NAN);
        figures["nltk"] = json!({
            "version": nltk["version"],
            "segments_per_s": nltk_rate,
            "bleu": nltk_bleu,
            "bleu_difference": (nltk_bleu - figures["bleu"].as_f64().unwrap_or(0.0)).abs(),
            "ratio_1_thread": bleu_1 / nltk_rate,
            "ratio_n_threads": bleu_n / nltk_rate,
            "total_seconds": nltk["total_seconds"],
            "end_to_end_ratio": nltk["total_seconds"].as_f64().unwrap_or(f64::NAN) / e2e_bleu,
            "end_to_end_ratio_slowest": nltk["total_seconds"].as_f64().unwrap_or(f64::NAN) / e2e_bleu_worst,
        });
        for (metric, chars, words) in END_TO_END_CHRF {
            log(format!("timing a plain Python {metric} on the same corpus"));
            let py_out = run_baseline(py, &files, "chrf", &[chars.to_string(), words.to_string(), crate::metric::DEFAULT_CHRF_BETA.to_string()])?;
            let total = py_out["total_seconds"].as_f64().unwrap_or(f64::NAN);
            let ours = figures["end_to_end"][metric].as_f64().unwrap_or(f64::NAN);
            figures[format!("python_{metric}")] = json!({
                "total_seconds": total,
                "score": py_out["score"],
                "score_difference": (py_out["score"].as_f64().unwrap_or(f64::NAN) - ours).abs(),
                "end_to_end_ratio": total / figures["end_to_end"][format!("{metric}_seconds")].as_f64().unwrap_or(f64::NAN),
                "end_to_end_ratio_slowest": total / figures["end_to_end"][format!("{metric}_seconds_slowest")].as_f64().unwrap_or(f64::NAN),
            });
        }
    }
    drop(files);
    let out = if a.json { serde_json::to_string_pretty(&figures).unwrap_or_default() + "\n" } else { human(&figures) };
    std::io::stdout().write_all(out.as_bytes()).map_err(|e| CliError::Output { what: "standard output".into(), source: e })
}

fn human(f: &Value) -> String {
    let n = |k: &str| f[k].as_f64().unwrap_or(f64::NAN);
    let mut s = format!(
        "mtgauge bench: {} segments, ~{} tokens, 1 reference, BLEU {:.2}\n",
        f["segments"], f["mean_tokens"], n("bleu")
    );
    s += &format!("  reference set build      {:8.3} s, BLEU tables {:.3} s\n", n("refset_build_seconds"), n("bleu_table_build_seconds"));
    s += &format!("  BLEU (whitespace)        {:10.0} segments/s on 1 thread\n", n("bleu_segments_per_s_1_thread"));
    s += &format!("  BLEU (whitespace)        {:10.0} segments/s on {} threads\n", n("bleu_segments_per_s_n_threads"), f["threads"]);
    s += &format!("  BLEU (nist tokenizer)    {:10.0} segments/s on 1 thread\n", n("bleu_nist_tokenizer_segments_per_s_1_thread"));
    s += &format!("  chrF                     {:10.0} segments/s on 1 thread\n", n("chrf_segments_per_s_1_thread"));
    s += &format!("  chrF++                   {:10.0} segments/s on 1 thread\n", n("chrfpp_segments_per_s_1_thread"));
    s += &format!(
        "  baseline: hash-map BLEU  {:10.0} segments/s -> engine is {:.1}x faster (1 thread)\n",
        n("baseline_hashmap_bleu_segments_per_s"),
        n("ratio_vs_hashmap_baseline_1_thread")
    );
    if let Some(nl) = f.get("nltk") {
        let g = |k: &str| nl[k].as_f64().unwrap_or(f64::NAN);
        s += &format!(
            "  baseline: NLTK {} corpus_bleu {:8.0} segments/s (scoring only) -> BLEU loop is {:.1}x faster on 1 thread, {:.1}x on {} (BLEU differs by {:.1e})\n",
            nl["version"].as_str().unwrap_or("?"),
            g("segments_per_s"),
            g("ratio_1_thread"),
            g("ratio_n_threads"),
            f["threads"],
            g("bleu_difference")
        );
    }
    let e = &f["end_to_end"];
    let g = |v: &Value, k: &str| v[k].as_f64().unwrap_or(f64::NAN);
    s += &format!("  end to end (`mtgauge score`, whole process, {} threads, fastest-slowest of {} runs):\n", f["threads"], e["runs"]);
    for (metric, label, baseline, base_key) in [("bleu", "BLEU  ", "NLTK corpus_bleu", "nltk"), ("chrf", "chrF  ", "plain Python chrF", "python_chrf"), ("chrf++", "chrF++", "plain Python chrF++", "python_chrf++")] {
        let mut line = format!("    {label}  {:.3}-{:.3} s (score {:.2})", g(e, &format!("{metric}_seconds")), g(e, &format!("{metric}_seconds_slowest")), g(e, metric));
        if let Some(b) = f.get(base_key) {
            line += &format!(
                "; {baseline} reading and scoring the same files {:.2} s -> {:.1}x faster ({:.1}x for the slowest run)",
                g(b, "total_seconds"),
                g(b, "end_to_end_ratio"),
                g(b, "end_to_end_ratio_slowest")
            );
        }
        s += &(line + "\n");
    }
    let r = &f["replicates"];
    s += &format!("  bootstrap replicates ({} segments, BLEU+chrF, 1 thread): scoring alone {:.0} segments/s", r["segments"], g(r, "segments_per_s_alone"));
    for w in r["with"].as_array().into_iter().flatten() {
        s += &format!("; with {} replicates {:.0} segments/s ({:.2}x the time)", w["resamples"], g(w, "segments_per_s"), g(w, "time_ratio"));
    }
    s += "\n";
    s += &super::bench_guards::guard_cost_line(&f["guards"]);
    s += &super::bench_guards::identifier_lines(&f["language_identifiers"]);
    s += &super::bench_external::external_cost_line(&f["external"]);
    let m1 = &f["memory_bytes_per_segment_1_ref"];
    let m2 = &f["memory_bytes_per_segment_2_refs"];
    s += &format!(
        "  memory per segment: 1 ref {:.0} B text + {:.0} B tables; 2 refs {:.0} B text + {:.0} B tables = {:.0} B\n",
        m1["refset"].as_f64().unwrap_or(0.0),
        m1["bleu_tables"].as_f64().unwrap_or(0.0),
        m2["refset"].as_f64().unwrap_or(0.0),
        m2["bleu_tables"].as_f64().unwrap_or(0.0),
        m2["total"].as_f64().unwrap_or(0.0)
    );
    s += &format!(
        "  memory per segment, 1 ref: chrF tables {:.0} B, chrF++ tables {:.0} B\n",
        m1["chrf_tables"].as_f64().unwrap_or(0.0),
        m1["chrfpp_tables"].as_f64().unwrap_or(0.0)
    );
    s
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn engine_equals_hashmap_baseline_on_a_generated_corpus() {
        let c = generate(300, 12, 200, 3, 11);
        let set = Arc::new(refset(&c));
        let compiled = Compiled::build(set, config("bleu", Tokenizer::Whitespace));
        let hyps: Vec<&str> = c.hyps.iter().map(String::as_str).collect();
        let (_, stats) = throughput(&compiled, &hyps, 2);
        assert_eq!(stats.bleu, naive_bleu(&c, 4));
        assert!(stats.bleu.matches[0] > 0 && stats.bleu.matches[3] < stats.bleu.totals[3]);
    }
}
