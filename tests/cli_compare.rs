//! The `mtgauge compare` binary end to end: the JSON fields, identical and degraded systems,
//! A against B as the negation of B against A, determinism, the recorded configuration, the
//! human view, `--help` and the error contract.
//!
//! Test text is invented for this file: words made of made-up syllables, drawn by the project's
//! seeded generator (a ferry operator's notices in an invented language). Files go to a fresh
//! directory under `std::env::temp_dir()`.

use std::path::PathBuf;
use std::process::{Command, Output, Stdio};
use std::sync::atomic::{AtomicUsize, Ordering};

use mtgauge::rng::SplitMix64;
use serde_json::Value;

const BIN: &str = env!("CARGO_BIN_EXE_mtgauge");
/// Prefix of every error line (src/cli/mod.rs, `run`).
const ERROR_PREFIX: &str = "mtgauge: error:";
/// Exit code of a failed command (src/cli/mod.rs, `EXIT_FAILURE`).
const EXIT_FAILURE: i32 = 2;
/// Metric keys of the JSON output (src/metric/config.rs, `Metric::name`).
const METRICS: [&str; 3] = ["bleu", "chrf", "chrf++"];

struct TempDir(PathBuf);

impl TempDir {
    fn new(tag: &str) -> TempDir {
        static NEXT: AtomicUsize = AtomicUsize::new(0);
        let n = NEXT.fetch_add(1, Ordering::Relaxed);
        let dir = std::env::temp_dir().join(format!("mtgauge-compare-{}-{tag}-{n}", std::process::id()));
        let _ = std::fs::remove_dir_all(&dir);
        std::fs::create_dir_all(&dir).expect("create temp dir");
        TempDir(dir)
    }

    fn file(&self, name: &str, lines: &[String]) -> String {
        let p = self.0.join(name);
        std::fs::write(&p, lines.iter().map(|l| format!("{l}\n")).collect::<String>()).expect("write test file");
        p.to_str().expect("UTF-8 temp path").to_owned()
    }
}

impl Drop for TempDir {
    fn drop(&mut self) {
        let _ = std::fs::remove_dir_all(&self.0);
    }
}

fn run(args: &[&str]) -> Output {
    Command::new(BIN).args(args).stdin(Stdio::null()).output().expect("run mtgauge")
}

fn text(b: &[u8]) -> String {
    String::from_utf8_lossy(b).into_owned()
}

fn json_ok(args: &[&str]) -> Value {
    let out = run(args);
    assert!(out.status.success(), "{args:?} failed: {}", text(&out.stderr));
    serde_json::from_slice(&out.stdout).unwrap_or_else(|e| panic!("stdout is not JSON ({e}): {}", text(&out.stdout)))
}

fn f64_of(v: &Value) -> f64 {
    v.as_f64().unwrap_or_else(|| panic!("not a number: {v}"))
}

fn assert_fails(out: &Output, mentions: &[&str]) {
    let err = text(&out.stderr);
    assert_eq!(out.status.code(), Some(EXIT_FAILURE), "stderr: {err}");
    assert!(out.stdout.is_empty(), "stdout must be empty, got {:?}", text(&out.stdout));
    assert!(err.starts_with(ERROR_PREFIX), "stderr: {err:?}");
    assert_eq!(err.trim_end().lines().count(), 1, "one line on stderr: {err:?}");
    for m in mentions {
        assert!(err.contains(m), "stderr does not mention {m:?}: {err:?}");
    }
}

/// An invented word from a number (syllables of made-up onsets and vowels).
fn word(mut k: u64) -> String {
    const ONSETS: [&str; 10] = ["k", "v", "t", "s", "m", "r", "l", "p", "d", "n"];
    const VOWELS: [&str; 5] = ["a", "e", "i", "o", "u"];
    let mut w = String::new();
    for _ in 0..2 {
        w.push_str(ONSETS[(k % 10) as usize]);
        k /= 10;
        w.push_str(VOWELS[(k % 5) as usize]);
        k /= 5;
    }
    w
}

/// `n` reference lines of 8-15 words from a 300-word vocabulary.
fn references(n: usize, seed: u64) -> Vec<Vec<String>> {
    let mut rng = SplitMix64::new(seed);
    (0..n).map(|_| (0..8 + rng.below(8)).map(|_| word(rng.below(300))).collect()).collect()
}

/// A copy of `lines` with each word replaced by another with probability `p`.
fn replace_words(lines: &[Vec<String>], p: f64, seed: u64) -> Vec<Vec<String>> {
    let mut rng = SplitMix64::new(seed);
    lines.iter().map(|l| l.iter().map(|w| if rng.chance(p) { word(300 + rng.below(300)) } else { w.clone() }).collect()).collect()
}

fn joined(lines: &[Vec<String>]) -> Vec<String> {
    lines.iter().map(|l| l.join(" ")).collect()
}

/// A reference file and two systems: A close to the references, B a clearly degraded copy of
/// A, C another system as good as A (each word replaced with the same probability as A's).
struct Systems {
    dir: TempDir,
    r: String,
    a: String,
    b: String,
    c: String,
}

fn systems(tag: &str, n: usize) -> Systems {
    let dir = TempDir::new(tag);
    let refs = references(n, 41);
    let a = replace_words(&refs, 0.15, 42);
    let b = replace_words(&a, 0.3, 43);
    let c = replace_words(&refs, 0.15, 44);
    let (r, a, b, c) = (dir.file("ref.txt", &joined(&refs)), dir.file("a.txt", &joined(&a)), dir.file("b.txt", &joined(&b)), dir.file("c.txt", &joined(&c)));
    Systems { dir, r, a, b, c }
}

const ALL_METRICS: [&str; 6] = ["--metric", "bleu", "--metric", "chrf", "--metric", "chrf++"];

fn compare(s: &Systems, a: &str, b: &str, extra: &[&str]) -> Value {
    let mut args = vec!["compare", "--ref", &s.r, "--hyp", a, "--hyp", b, "--tokenizer", "whitespace", "--json"];
    args.extend_from_slice(&ALL_METRICS);
    args.extend_from_slice(extra);
    json_ok(&args)
}

#[test]
fn identical_systems_give_no_difference_and_p_one() {
    let s = systems("same", 200);
    let v = compare(&s, &s.a, &s.a, &[]);
    for m in METRICS {
        let x = &v[m];
        assert_eq!(f64_of(&x["difference"]), 0.0, "{m}");
        assert_eq!(f64_of(&x["a"]["score"]), f64_of(&x["b"]["score"]), "{m}");
        let (lo, hi) = (f64_of(&x["interval"]["low"]), f64_of(&x["interval"]["high"]));
        assert!(lo <= 0.0 && 0.0 <= hi, "{m}: {lo}..{hi}");
        assert_eq!(f64_of(&x["p_value"]), 1.0, "{m}");
        assert_eq!(x["segments"], 200);
    }
}

#[test]
fn a_degraded_copy_is_significantly_worse() {
    let s = systems("worse", 300);
    let v = compare(&s, &s.a, &s.b, &[]);
    for m in METRICS {
        let x = &v[m];
        let d = f64_of(&x["difference"]);
        assert!((d - (f64_of(&x["a"]["score"]) - f64_of(&x["b"]["score"]))).abs() < 1e-12, "{m}");
        let (lo, hi) = (f64_of(&x["interval"]["low"]), f64_of(&x["interval"]["high"]));
        assert!(0.0 < lo && lo < d && d < hi, "{m}: {d} in {lo}..{hi}");
        assert!(f64_of(&x["p_value"]) < 0.01, "{m}: {}", x["p_value"]);
        assert_eq!(x["trials"], 10_000, "{m}: the default trials");
    }
    // Each system's score is what `score` gives for its file alone.
    for (sys, key) in [(&s.a, "a"), (&s.b, "b")] {
        let mut args = vec!["score", "--ref", &s.r, "--hyp", sys, "--tokenizer", "whitespace", "--json"];
        args.extend_from_slice(&ALL_METRICS);
        let one = json_ok(&args);
        for m in METRICS {
            assert_eq!(f64_of(&one[m]["score"]), f64_of(&v[m][key]["score"]), "{m} {key}");
        }
        assert_eq!(one["refset"], v["refset"]);
    }
}

#[test]
fn b_against_a_is_a_against_b_negated() {
    let s = systems("swap", 150);
    for (x, y) in [(&s.a, &s.b), (&s.a, &s.c)] {
        let (ab, ba) = (compare(&s, x, y, &["--trials", "3000"]), compare(&s, y, x, &["--trials", "3000"]));
        for m in METRICS {
            assert_eq!(f64_of(&ab[m]["difference"]), -f64_of(&ba[m]["difference"]), "{m}");
            assert_eq!(f64_of(&ab[m]["interval"]["low"]), -f64_of(&ba[m]["interval"]["high"]), "{m}");
            assert_eq!(f64_of(&ab[m]["interval"]["high"]), -f64_of(&ba[m]["interval"]["low"]), "{m}");
            assert_eq!(ab[m]["p_value"], ba[m]["p_value"], "{m}");
            assert_eq!(ab[m]["a"], ba[m]["b"], "{m}");
        }
        assert_eq!(ab["systems"]["a"], ba["systems"]["b"]);
    }
}

#[test]
fn deterministic_under_a_seed_and_recorded() {
    let s = systems("seed", 150);
    let args = |seed: &'static str, threads: &'static str| ["--trials", "2000", "--resamples", "300", "--seed", seed, "--threads", threads, "--level", "0.9"];
    let one = compare(&s, &s.a, &s.c, &args("5", "1"));
    assert_eq!(compare(&s, &s.a, &s.c, &args("5", "2")), one, "threads change nothing");
    assert_eq!(compare(&s, &s.a, &s.c, &args("5", "1")), one, "same seed, same output");
    let other = compare(&s, &s.a, &s.c, &args("6", "1"));
    assert_eq!(other["bleu"]["difference"], one["bleu"]["difference"]);
    assert_ne!(other["bleu"]["interval"], one["bleu"]["interval"], "another seed, other weights");
    let c = &one["config"]["comparison"];
    assert_eq!((c["resamples"].as_u64(), c["trials"].as_u64(), c["seed"].as_u64(), c["level"].as_f64()), (Some(300), Some(2000), Some(5), Some(0.9)));
    assert_eq!(c["test"], "approximate-randomization");
    assert_eq!(one["config"]["tokenizer"], "whitespace");
    assert_eq!(one["bleu"]["interval"]["resamples"], 300);
    assert_eq!(one["bleu"]["interval"]["level"], 0.9);
    assert_eq!(one["refset"]["segments"], 150);
    assert!(one["note"].as_str().is_some_and(|n| n.contains("proxy")));
    // The p-value is (c + 1) / (trials + 1), c the trials written beside it.
    for m in METRICS {
        let (p, c) = (f64_of(&one[m]["p_value"]), one[m]["extreme_trials"].as_u64().expect("integer"));
        assert!((p - (c as f64 + 1.0) / 2001.0).abs() < 1e-15, "{m}: p {p}, c {c}");
    }
    let off = compare(&s, &s.a, &s.c, &["--resamples", "0", "--trials", "0"]);
    assert!(off["bleu"]["interval"].is_null() && off["bleu"]["p_value"].is_null() && off["bleu"]["a"]["interval"].is_null());
}

#[test]
fn human_view_shows_both_systems_the_difference_and_the_note() {
    let s = systems("human", 120);
    let out = run(&["compare", "--ref", &s.r, "--hyp", &s.a, "--hyp", &s.b, "--trials", "500"]);
    assert!(out.status.success(), "{}", text(&out.stderr));
    let t = text(&out.stdout);
    for want in ["mtgauge compare: 120 segments", "A = ", "B = ", "BLEU", "chrF", "A - B", "p-value", "paired bootstrap", "approximate randomization", "config  tokenizer=", "proxy"] {
        assert!(t.contains(want), "human view lacks {want:?}:\n{t}");
    }
    assert!(t.contains("0.0020"), "p = 1/501 when no trial comes near:\n{t}");
}

#[test]
fn help_says_what_the_interval_and_the_p_value_mean() {
    let out = run(&["compare", "--help"]);
    assert!(out.status.success());
    // clap wraps the text to the terminal width: compare with single spaces.
    let t = text(&out.stdout).split_whitespace().collect::<Vec<_>>().join(" ");
    for want in ["--hyp", "--resamples", "--trials", "--seed", "--level", "segment id", "the same for A and B", "(c + 1) / (trials + 1)", "interchangeable", "proxy"] {
        assert!(t.contains(want), "compare --help lacks {want:?}");
    }
}

#[test]
fn errors_are_one_line_with_exit_code_2() {
    let s = systems("errors", 30);
    let short = s.dir.file("short.txt", &joined(&references(29, 9)));
    assert_fails(&run(&["compare", "--ref", &s.r, "--hyp", &s.a, "--hyp", &short]), &["short.txt:30", "29 lines"]);
    let long = s.dir.file("long.txt", &joined(&references(31, 9)));
    assert_fails(&run(&["compare", "--ref", &s.r, "--hyp", &long, "--hyp", &s.a]), &["long.txt:31", "extra line"]);
    assert_fails(&run(&["compare", "--ref", &s.r, "--hyp", &s.a]), &["--hyp", "twice"]);
    assert_fails(&run(&["compare", "--ref", &s.r, "--hyp", &s.a, "--hyp", &s.b, "--hyp", &s.c]), &["--hyp", "twice"]);
    assert_fails(&run(&["compare", "--ref", &s.r, "--hyp", "-", "--hyp", "-"]), &["standard input"]);
    assert_fails(&run(&["compare", "--ref", &s.r, "--hyp", &s.a, "--hyp", &s.b, "--level", "1"]), &["--level"]);
    assert_fails(&run(&["compare", "--ref", &s.r, "--hyp", &s.a, "--hyp", &s.b, "--trials", "1000001"]), &["--trials"]);
    assert_fails(&run(&["compare", "--ref", &s.r, "--hyp", &s.a, "--hyp", "/nonexistent/b.txt"]), &["/nonexistent/b.txt"]);
    assert_fails(&run(&["compare", "--ref", &s.r, "--hyp", &s.a, "--hyp", &s.b, "--metric", "bleu:order=99"]), &["order"]);
}
