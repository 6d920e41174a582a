//! The `mtgauge` binary end to end: `score` (JSON output, stdin, JSONL references, per-segment
//! output, the error contract), `demo` and `--help`.
//!
//! Test text is invented for this file (an invented ferry scenario with made-up words such as
//! "kel" and "vop"). Files go to a fresh directory under `std::env::temp_dir()`.

use std::io::Write;
use std::path::PathBuf;
use std::process::{Command, Output, Stdio};
use std::sync::atomic::{AtomicUsize, Ordering};

use serde_json::Value;

const BIN: &str = env!("CARGO_BIN_EXE_mtgauge");
/// Prefix of every error line (src/cli/mod.rs, `run`).
const ERROR_PREFIX: &str = "mtgauge: error:";
/// Exit code of a failed command (src/cli/mod.rs, `EXIT_FAILURE`).
const EXIT_FAILURE: i32 = 2;

// ---------------------------------------------------------------------------------------------
// Helpers
// ---------------------------------------------------------------------------------------------

/// A temporary directory, removed on drop.
struct TempDir(PathBuf);

impl TempDir {
    fn new(tag: &str) -> TempDir {
        static NEXT: AtomicUsize = AtomicUsize::new(0);
        let n = NEXT.fetch_add(1, Ordering::Relaxed);
        let nanos = std::time::SystemTime::now().duration_since(std::time::UNIX_EPOCH).map_or(0, |d| d.as_nanos());
        let dir = std::env::temp_dir().join(format!("mtgauge-cli-{}-{tag}-{n}-{nanos}", std::process::id()));
        std::fs::create_dir_all(&dir).expect("create temp dir");
        TempDir(dir)
    }

    /// Write `bytes` to `name` in the directory; the path as a string.
    fn file(&self, name: &str, bytes: impl AsRef<[u8]>) -> String {
        let p = self.0.join(name);
        std::fs::write(&p, bytes).expect("write test file");
        p.to_str().expect("UTF-8 temp path").to_owned()
    }

    fn path(&self, name: &str) -> String {
        self.0.join(name).to_str().expect("UTF-8 temp path").to_owned()
    }
}

impl Drop for TempDir {
    fn drop(&mut self) {
        let _ = std::fs::remove_dir_all(&self.0);
    }
}

fn lines(ls: &[&str]) -> String {
    ls.iter().map(|l| format!("{l}\n")).collect()
}

fn run(args: &[&str]) -> Output {
    run_stdin(args, None)
}

fn run_stdin(args: &[&str], stdin: Option<&[u8]>) -> Output {
    let mut child = Command::new(BIN)
        .args(args)
        .stdin(if stdin.is_some() { Stdio::piped() } else { Stdio::null() })
        .stdout(Stdio::piped())
        .stderr(Stdio::piped())
        .spawn()
        .expect("run mtgauge");
    if let Some(bytes) = stdin {
        let mut pipe = child.stdin.take().expect("stdin pipe");
        pipe.write_all(bytes).expect("write stdin");
    }
    child.wait_with_output().expect("wait for mtgauge")
}

fn text(b: &[u8]) -> String {
    String::from_utf8_lossy(b).into_owned()
}

/// Run a command that must succeed; its stdout parsed as JSON.
fn json_ok(args: &[&str], stdin: Option<&[u8]>) -> Value {
    let out = run_stdin(args, stdin);
    assert!(out.status.success(), "{args:?} failed: {}", text(&out.stderr));
    serde_json::from_slice(&out.stdout).unwrap_or_else(|e| panic!("stdout is not JSON ({e}): {}", text(&out.stdout)))
}

/// A u64 array field.
fn u64s(v: &Value) -> Vec<u64> {
    v.as_array().unwrap_or_else(|| panic!("not an array: {v}")).iter().map(|x| x.as_u64().expect("integer")).collect()
}

fn f64_of(v: &Value) -> f64 {
    v.as_f64().unwrap_or_else(|| panic!("not a number: {v}"))
}

fn close(a: f64, b: f64) -> bool {
    (a - b).abs() < 1e-9
}

/// The failure contract: exit code 2, nothing on stdout, one stderr line starting with the
/// error prefix and containing every string of `mentions`.
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

// The shared small corpus: two segments, two reference streams, tokens separated by single
// spaces with no punctuation (so `nist` and `whitespace` tokenize alike).
const HYP: &[&str] = &["kel ferry sails at dawn", "mind the gap vop vop"];
const REF1: &[&str] = &["kel ferry sails at dawn today", "mind the gap"];
const REF2: &[&str] = &["the kel boat sails at dawn", "vop mind the wide gap"];

struct Corpus {
    dir: TempDir,
    hyp: String,
    r1: String,
    r2: String,
}

fn corpus(tag: &str) -> Corpus {
    let dir = TempDir::new(tag);
    let hyp = dir.file("hyp.txt", lines(HYP));
    let r1 = dir.file("ref1.txt", lines(REF1));
    let r2 = dir.file("ref2.txt", lines(REF2));
    Corpus { dir, hyp, r1, r2 }
}

// ---------------------------------------------------------------------------------------------
// score --json
// ---------------------------------------------------------------------------------------------

#[test]
fn score_json_fields_and_values() {
    let c = corpus("json");
    let v = json_ok(&["score", "--ref", &c.r1, "--ref", &c.r2, "--hyp", &c.hyp, "--json"], None);
    assert_eq!(v["segments"], 2);

    // Hand count (clipping by the largest count in any one reference, Papineni et al. 2002):
    // segment 1, "kel ferry sails at dawn": every n-gram of orders 1-4 occurs in ref1 ->
    //   matches = totals = [5, 4, 3, 2]; c = 5, reference lengths 6 and 6 -> r = 6.
    // segment 2, "mind the gap vop vop": unigrams mind, the, gap match; "vop" x2 is clipped to
    //   1 (ref2 has one) -> 4 of 5; bigrams "mind the", "the gap" -> 2 of 4; trigram
    //   "mind the gap" (ref1) -> 1 of 3; 4-grams -> 0 of 2; c = 5, lengths 3 and 5 -> r = 5.
    // Corpus: matches [9, 6, 4, 2], totals [10, 8, 6, 4], c = 10, r = 11.
    let b = &v["bleu"];
    assert_eq!(u64s(&b["matched"]), [9, 6, 4, 2]);
    assert_eq!(u64s(&b["candidates"]), [10, 8, 6, 4]);
    assert_eq!(b["tokens"]["hypothesis"], 10);
    assert_eq!(b["tokens"]["reference"], 11);
    let precisions: Vec<f64> = b["precision"].as_array().expect("precision").iter().map(f64_of).collect();
    assert_eq!(precisions.len(), 4);
    for (p, want) in precisions.iter().zip([90.0, 75.0, 200.0 / 3.0, 50.0]) {
        assert!(close(*p, want), "precisions {precisions:?}");
    }
    // BP = exp(1 - r/c) = exp(1 - 11/10) = exp(-0.1) (Papineni et al. 2002);
    // BLEU = 100 * BP * (9/10 * 6/8 * 4/6 * 2/4)^(1/4) = 100 * exp(-0.1) * 0.225^(1/4) = 62.32...
    let bp = (-0.1f64).exp();
    assert!(close(f64_of(&b["brevity"]), bp), "{}", b["brevity"]);
    let bleu = 100.0 * bp * 0.225f64.powf(0.25);
    assert!(close(f64_of(&b["score"]), bleu), "{} vs {bleu}", b["score"]);
    assert!((bleu - 62.32).abs() < 0.01);

    // chrF: the score is the F-beta of the reported per-order counts (character orders 1-6).
    let ch = &v["chrf"];
    let (m, h, r) = (u64s(&ch["chars"]["matched"]), u64s(&ch["chars"]["candidates"]), u64s(&ch["chars"]["reference"]));
    assert_eq!((m.len(), h.len(), r.len()), (6, 6, 6));
    // Non-space characters of the hypotheses: 19 + 16 = 35; order n has 35 - 2 (n - 1) n-grams.
    assert_eq!(h, [35, 33, 31, 29, 27, 25]);
    let p = m.iter().zip(&h).map(|(&m, &h)| m as f64 / h as f64).sum::<f64>() / 6.0;
    let rc = m.iter().zip(&r).map(|(&m, &r)| m as f64 / r as f64).sum::<f64>() / 6.0;
    let f = 100.0 * 5.0 * p * rc / (4.0 * p + rc); // beta = 2: (1 + 4) P R / (4 P + R)
    assert!(close(f64_of(&ch["score"]), f), "{} vs {f}", ch["score"]);
    assert!(f > 0.0 && f < 100.0);
    assert!(ch.get("words").is_none() && ch.get("chosen").is_none(), "corpus chrF has no word orders and no chosen reference");
    assert!(v.get("chrf++").is_none(), "chrF++ is not a default metric");

    // The configuration travels with the scores.
    let cfg = &v["config"];
    assert_eq!(
        cfg["metrics"],
        serde_json::json!({"bleu": {"order": 4, "ref-length": "closest", "smoothing": "epsilon", "epsilon": 0.1},
                           "chrf": {"chars": 6, "words": 0, "beta": 2.0}})
    );
    assert_eq!(cfg["tokenizer"], "nist");
    assert_eq!(cfg["caseless"], false);
    assert_eq!(cfg["version"], env!("CARGO_PKG_VERSION"));

    let rs = &v["refset"];
    assert_eq!(rs["segments"], 2);
    assert_eq!(rs["references"], 4);
    let digest = rs["digest"].as_str().expect("digest");
    assert!(digest.len() == 64 && digest.bytes().all(|b| b.is_ascii_hexdigit()), "{digest}");
}

#[test]
fn score_json_records_non_default_configuration() {
    let c = corpus("config");
    let v = json_ok(
        &[
            "score", "--ref", &c.r1, "--ref", &c.r2, "--hyp", &c.hyp, "--json", "--tokenizer", "whitespace", "--caseless",
            "--metric", "bleu:order=3,ref-length=shortest,smoothing=plus-one,epsilon=0.25", "--metric", "chrf++:chars=4,words=1,beta=1",
        ],
        None,
    );
    let cfg = &v["config"];
    assert_eq!(
        cfg["metrics"],
        serde_json::json!({"bleu": {"order": 3, "ref-length": "shortest", "smoothing": "plus-one", "epsilon": 0.25},
                           "chrf++": {"chars": 4, "words": 1, "beta": 1.0}})
    );
    assert_eq!(cfg["tokenizer"], "whitespace");
    assert_eq!(cfg["caseless"], true);
    // The outputs follow the configuration: three BLEU orders, shortest lengths (6 and 3 -> 9),
    // chrF++ with 4 character and 1 word order, no plain chrF.
    let b = &v["bleu"];
    assert_eq!(u64s(&b["matched"]), [9, 6, 4]);
    assert_eq!(b["precision"].as_array().map(Vec::len), Some(3));
    assert_eq!(b["tokens"]["reference"], 9);
    assert!(v.get("chrf").is_none());
    let pp = &v["chrf++"];
    assert_eq!(u64s(&pp["chars"]["candidates"]).len(), 4);
    // Words of the hypotheses: 5 + 5.
    assert_eq!(u64s(&pp["words"]["candidates"]), [10]);
}

#[test]
fn stdin_hypotheses_equal_the_file() {
    let c = corpus("stdin");
    let args = ["score", "--ref", &c.r1, "--ref", &c.r2, "--json", "--metric", "bleu", "--metric", "chrf", "--metric", "chrf++", "--hyp"];
    let from_file = json_ok(&[&args[..], &[c.hyp.as_str()]].concat(), None);
    let from_stdin = json_ok(&[&args[..], &["-"]].concat(), Some(lines(HYP).as_bytes()));
    assert_eq!(from_file, from_stdin);
    assert_eq!(from_file["segments"], 2);
}

#[test]
fn threads_do_not_change_the_output() {
    let c = corpus("threads");
    let base = ["score", "--ref", &c.r1, "--ref", &c.r2, "--hyp", &c.hyp, "--json", "--threads"];
    let one = json_ok(&[&base[..], &["1"]].concat(), None);
    let four = json_ok(&[&base[..], &["4"]].concat(), None);
    assert_eq!(one, four);
    assert_fails(&run(&[&base[..], &["0"]].concat()), &["--threads"]);
}

#[test]
fn human_output_shows_the_scores() {
    let c = corpus("human");
    let out = run(&["score", "--ref", &c.r1, "--ref", &c.r2, "--hyp", &c.hyp]);
    assert!(out.status.success(), "{}", text(&out.stderr));
    let s = text(&out.stdout);
    assert!(s.contains("2 segments"), "{s}");
    // 62.32 from the hand computation in score_json_fields_and_values.
    assert!(s.lines().any(|l| l.trim_start().starts_with("BLEU") && l.contains("62.32")), "{s}");
    assert!(s.lines().any(|l| l.trim_start().starts_with("chrF")), "{s}");
}

// ---------------------------------------------------------------------------------------------
// JSONL references
// ---------------------------------------------------------------------------------------------

fn jsonl_record(id: Value, source: Option<&str>, refs: &[&str]) -> String {
    let mut m = serde_json::Map::new();
    m.insert("id".into(), id);
    if let Some(s) = source {
        m.insert("source".into(), Value::from(s));
    }
    m.insert("refs".into(), Value::from(refs.to_vec()));
    Value::Object(m).to_string() + "\n"
}

#[test]
fn jsonl_references_give_the_same_statistics_as_plain_files() {
    let c = corpus("jsonl");
    let metrics = ["--metric", "bleu", "--metric", "chrf", "--metric", "chrf++", "--json"];
    let plain = json_ok(&[&["score", "--ref", &c.r1, "--ref", &c.r2, "--hyp", &c.hyp][..], &metrics].concat(), None);

    // With sources and string ids: the same statistics, a different reference set digest.
    let sources = ["The Kel ferry sails at dawn.", "Mind the gap."];
    let with_src: String = (0..2)
        .map(|i| jsonl_record(Value::from(format!("notice-{}", i + 1)), Some(sources[i]), &[REF1[i], REF2[i]]))
        .collect();
    let jsonl = c.dir.file("refs.jsonl", with_src);
    let from_jsonl = json_ok(&[&["score", "--ref", &jsonl, "--hyp", &c.hyp][..], &metrics].concat(), None);
    for key in ["segments", "bleu", "chrf", "chrf++", "config"] {
        assert_eq!(from_jsonl[key], plain[key], "{key}");
    }
    assert_eq!(from_jsonl["refset"]["references"], 4);
    assert_ne!(from_jsonl["refset"]["digest"], plain["refset"]["digest"]);

    // Integer ids 1, 2 and no source: the very segments plain files give (ids are line numbers),
    // so the digest is equal too. Also read with an explicit --ref-format and another extension.
    let same: String = (0..2).map(|i| jsonl_record(Value::from(i + 1), None, &[REF1[i], REF2[i]])).collect();
    let txt = c.dir.file("refs-as-text.txt", same);
    let args = [&["score", "--ref", &txt, "--ref-format", "jsonl", "--hyp", &c.hyp][..], &metrics].concat();
    let exact = json_ok(&args, None);
    assert_eq!(exact, plain);
}

// ---------------------------------------------------------------------------------------------
// --per-segment
// ---------------------------------------------------------------------------------------------

fn add_into(acc: &mut Vec<u64>, v: &Value) {
    let xs = u64s(v);
    if acc.is_empty() {
        acc.resize(xs.len(), 0);
    }
    assert_eq!(acc.len(), xs.len());
    for (a, x) in acc.iter_mut().zip(xs) {
        *a += x;
    }
}

#[test]
fn per_segment_lines_sum_to_the_corpus() {
    let dir = TempDir::new("perseg");
    // Five segments, one of them empty, one identical to its second reference.
    let hyp = dir.file(
        "hyp.txt",
        lines(&[
            "kel ferry sails at dawn",
            "mind the gap vop vop",
            "",
            "tickets at gate four please",
            "zin tarn lok",
        ]),
    );
    let r1 = dir.file(
        "ref1.txt",
        lines(&[
            "kel ferry sails at dawn today",
            "mind the gap",
            "the kiosk is closed",
            "tickets please at gate four",
            "zin tarn",
        ]),
    );
    let r2 = dir.file(
        "ref2.txt",
        lines(&[
            "the kel boat sails at dawn",
            "vop mind the wide gap",
            "kiosk closed",
            "please show tickets at gate four",
            "zin tarn lok",
        ]),
    );
    let seg_file = dir.path("segments.jsonl");
    let corpus = json_ok(
        &[
            "score", "--ref", &r1, "--ref", &r2, "--hyp", &hyp, "--json", "--metric", "bleu", "--metric", "chrf", "--metric", "chrf++", "--per-segment",
            &seg_file,
        ],
        None,
    );
    // Without --per-segment the corpus is summed without keeping segments: the same output.
    let summed = json_ok(&["score", "--ref", &r1, "--ref", &r2, "--hyp", &hyp, "--json", "--metric", "bleu", "--metric", "chrf", "--metric", "chrf++"], None);
    assert_eq!(summed, corpus, "the corpus with and without --per-segment");
    let written = std::fs::read_to_string(&seg_file).expect("per-segment file written");
    let segs: Vec<Value> = written.lines().map(|l| serde_json::from_str(l).expect("one JSON object per line")).collect();
    assert_eq!(segs.len(), 5);
    assert_eq!(corpus["segments"], 5);
    let ids: Vec<&str> = segs.iter().map(|s| s["id"].as_str().expect("id")).collect();
    assert_eq!(ids, ["1", "2", "3", "4", "5"]);

    let (mut bm, mut bt, mut hl, mut rl) = (Vec::new(), Vec::new(), 0, 0);
    let mut sums: Vec<Vec<u64>> = vec![Vec::new(); 8];
    for s in &segs {
        add_into(&mut bm, &s["bleu"]["matched"]);
        add_into(&mut bt, &s["bleu"]["candidates"]);
        hl += s["bleu"]["tokens"]["hypothesis"].as_u64().expect("hypothesis tokens");
        rl += s["bleu"]["tokens"]["reference"].as_u64().expect("reference tokens");
        for (k, (metric, kind, field)) in [
            ("chrf", "chars", "matched"),
            ("chrf", "chars", "candidates"),
            ("chrf", "chars", "reference"),
            ("chrf++", "chars", "matched"),
            ("chrf++", "chars", "candidates"),
            ("chrf++", "chars", "reference"),
            ("chrf++", "words", "matched"),
            ("chrf++", "words", "reference"),
        ]
        .into_iter()
        .enumerate()
        {
            add_into(&mut sums[k], &s[metric][kind][field]);
        }
        let sb = f64_of(&s["bleu"]["score"]);
        assert!((0.0..=100.0).contains(&sb));
    }
    let b = &corpus["bleu"];
    assert_eq!(bm, u64s(&b["matched"]));
    assert_eq!(bt, u64s(&b["candidates"]));
    assert_eq!(hl, b["tokens"]["hypothesis"].as_u64().unwrap());
    assert_eq!(rl, b["tokens"]["reference"].as_u64().unwrap());
    assert_eq!(sums[0], u64s(&corpus["chrf"]["chars"]["matched"]));
    assert_eq!(sums[1], u64s(&corpus["chrf"]["chars"]["candidates"]));
    assert_eq!(sums[2], u64s(&corpus["chrf"]["chars"]["reference"]));
    assert_eq!(sums[3], u64s(&corpus["chrf++"]["chars"]["matched"]));
    assert_eq!(sums[4], u64s(&corpus["chrf++"]["chars"]["candidates"]));
    assert_eq!(sums[5], u64s(&corpus["chrf++"]["chars"]["reference"]));
    assert_eq!(sums[6], u64s(&corpus["chrf++"]["words"]["matched"]));
    assert_eq!(sums[7], u64s(&corpus["chrf++"]["words"]["reference"]));

    // Spot checks by hand. Segment 3 is empty: nothing counted on the hypothesis side, sentence
    // scores 0; its effective reference length is the closer of 4 and 2 tokens to 0 -> 2.
    let s3 = &segs[2];
    assert_eq!(u64s(&s3["bleu"]["candidates"]), [0, 0, 0, 0]);
    assert_eq!(s3["bleu"]["tokens"]["hypothesis"], 0);
    assert_eq!(s3["bleu"]["tokens"]["reference"], 2);
    assert_eq!(f64_of(&s3["bleu"]["score"]), 0.0);
    assert_eq!(f64_of(&s3["chrf"]["score"]), 0.0);
    // Segment 5 equals its second reference: chrF and chrF++ pick reference index 1 and score
    // 100. With 3 tokens there is no 4-gram: matches = totals = [3, 2, 1, 0], r = 3, BP = 1.
    // Sentence BLEU (src/metric/bleu.rs: denominator at least 1, epsilon 0.1 for a zero count)
    // is 100 * (1 * 1 * 1 * 0.1/1)^(1/4) = 56.23...
    let s5 = &segs[4];
    assert_eq!(s5["chrf"]["chosen"], 1);
    assert_eq!(s5["chrf++"]["chosen"], 1);
    assert!(close(f64_of(&s5["chrf"]["score"]), 100.0));
    assert!(close(f64_of(&s5["chrf++"]["score"]), 100.0));
    assert_eq!(u64s(&s5["bleu"]["matched"]), [3, 2, 1, 0]);
    assert_eq!(u64s(&s5["bleu"]["candidates"]), [3, 2, 1, 0]);
    assert_eq!(s5["bleu"]["tokens"]["reference"], 3);
    assert!(close(f64_of(&s5["bleu"]["score"]), 100.0 * 0.1f64.powf(0.25)), "{}", s5["bleu"]["score"]);
    // Segment 1: all n-grams in ref1 (5 tokens, matches 5,4,3,2), r = 6: the sentence score is
    // unsmoothed 100 * exp(1 - 6/5) (Papineni et al. 2002 brevity penalty).
    let s1 = &segs[0];
    assert_eq!(u64s(&s1["bleu"]["matched"]), [5, 4, 3, 2]);
    assert!(close(f64_of(&s1["bleu"]["score"]), 100.0 * (1.0f64 - 6.0 / 5.0).exp()));
}

// ---------------------------------------------------------------------------------------------
// Errors: exit code 2, nothing on stdout, one line on stderr naming the file (and line).
// ---------------------------------------------------------------------------------------------

#[test]
fn hypothesis_with_more_lines_than_references() {
    let dir = TempDir::new("count");
    let r = dir.file("ref-two.txt", lines(&["vop kel", "zin tarn"]));
    let h = dir.file("hyp-three.txt", lines(&["vop kel", "zin tarn", "lok"]));
    let out = run(&["score", "--ref", &r, "--hyp", &h, "--json"]);
    // Line 3 of the hypothesis file has no reference.
    assert_fails(&out, &["hyp-three.txt:3:", "ref-two.txt"]);
}

#[test]
fn hypothesis_with_fewer_lines_than_references() {
    let dir = TempDir::new("count2");
    let r = dir.file("ref-three.txt", lines(&["vop kel", "zin tarn", "lok"]));
    let h = dir.file("hyp-two.txt", lines(&["vop kel", "zin tarn"]));
    let out = run(&["score", "--ref", &r, "--hyp", &h, "--json"]);
    assert_fails(&out, &["hyp-two.txt:3:", "ref-three.txt"]);
}

#[test]
fn reference_streams_of_different_lengths() {
    let dir = TempDir::new("streams");
    let r1 = dir.file("ref-a.txt", lines(&["vop kel", "zin tarn"]));
    let r2 = dir.file("ref-b.txt", lines(&["vop kel"]));
    let h = dir.file("hyp.txt", lines(&["vop kel", "zin tarn"]));
    let out = run(&["score", "--ref", &r1, "--ref", &r2, "--hyp", &h]);
    assert_fails(&out, &["ref-b.txt:2:", "ref-a.txt"]);
}

#[test]
fn missing_files() {
    let c = corpus("missing");
    let gone = c.dir.path("no-such-hyp.txt");
    assert_fails(&run(&["score", "--ref", &c.r1, "--hyp", &gone, "--json"]), &["no-such-hyp.txt", "cannot read"]);
    let gone = c.dir.path("no-such-ref.txt");
    assert_fails(&run(&["score", "--ref", &c.r1, "--ref", &gone, "--hyp", &c.hyp, "--json"]), &["no-such-ref.txt"]);
}

#[test]
fn invalid_utf8_names_file_and_line() {
    let c = corpus("utf8");
    // Line 2 is "mind the \xFF gap": the bad byte is byte 10 of the line.
    let bad = c.dir.file("bad-hyp.txt", b"kel ferry sails at dawn\nmind the \xFF gap\n");
    let out = run(&["score", "--ref", &c.r1, "--hyp", &bad, "--json"]);
    assert_fails(&out, &["bad-hyp.txt:2:", "UTF-8", "byte 10"]);
    // In a reference file, and through standard input.
    let bad_ref = c.dir.file("bad-ref.txt", b"ok\n\xC3\x28\n");
    assert_fails(&run(&["score", "--ref", &bad_ref, "--hyp", &c.hyp]), &["bad-ref.txt:2:", "UTF-8"]);
    let out = run_stdin(&["score", "--ref", &c.r1, "--hyp", "-"], Some(b"\xE2\x82\n"));
    assert_fails(&out, &["<stdin>:1:", "UTF-8"]);
}

/// A reference that is not a regular file (here a pipe, /dev/stdin) is read once, whole: the
/// scores equal those of the same reference in a file, and its errors are worded from the bytes
/// read (not from a second, empty read).
#[test]
fn a_piped_reference_is_read_once() {
    let c = corpus("pipe");
    if !std::path::Path::new("/dev/stdin").exists() {
        return;
    }
    let reference = std::fs::read(&c.r1).expect("read reference");
    let piped = run_stdin(&["score", "--ref", "/dev/stdin", "--hyp", &c.hyp, "--json", "--metric", "bleu"], Some(&reference));
    let filed = run(&["score", "--ref", &c.r1, "--hyp", &c.hyp, "--json", "--metric", "bleu"]);
    assert!(piped.status.success() && filed.status.success(), "{}", text(&piped.stderr));
    assert_eq!(text(&piped.stdout), text(&filed.stdout));
    let mut bad = reference.clone();
    bad.splice(0..0, b"\xC3\x28\n".iter().copied());
    let out = run_stdin(&["score", "--ref", "/dev/stdin", "--hyp", &c.hyp], Some(&bad));
    assert_fails(&out, &["/dev/stdin:1:", "UTF-8"]);
}

#[test]
fn malformed_jsonl() {
    let c = corpus("badjsonl");
    let good = jsonl_record(Value::from("a"), None, &["kel ferry sails at dawn"]);
    for (name, second, what) in [
        ("broken.jsonl", "{\"id\": \"b\", \"refs\": [\"mind the gap\"\n".to_owned(), "malformed"),
        ("norefs.jsonl", "{\"id\": \"b\"}\n".to_owned(), "malformed"),
        ("emptyrefs.jsonl", "{\"id\": \"b\", \"refs\": []}\n".to_owned(), "refs"),
        ("blank.jsonl", "\n".to_owned(), "empty line"),
        ("dup.jsonl", good.clone(), "duplicate"),
    ] {
        let f = c.dir.file(name, good.clone() + &second);
        let out = run(&["score", "--ref", &f, "--hyp", &c.hyp, "--json"]);
        let line = if what == "duplicate" { "" } else { ":2:" };
        assert_fails(&out, &[&format!("{name}{line}"), what]);
    }
}

#[test]
fn bad_option_values_fail_like_input_errors() {
    let c = corpus("badopt");
    let out = run(&["score", "--ref", &c.r1, "--hyp", &c.hyp, "--metric", "bleu:order=0"]);
    assert_fails(&out, &["bleu:order must be between 1 and 8, got 0"]);
    let out = run(&["score", "--ref", &c.r1, "--hyp", &c.hyp, "--metric", "chrf:beta=0"]);
    assert_fails(&out, &["chrf:beta must be a positive number"]);
    let out = run(&["score", "--ref", &c.r1, "--hyp", &c.hyp, "--metric", "bleu:chars=3"]);
    assert_fails(&out, &["unknown key 'chars' for bleu", "valid keys: order, ref-length, smoothing, epsilon"]);
}

// ---------------------------------------------------------------------------------------------
// --interval
// ---------------------------------------------------------------------------------------------

/// `n` segments of invented words (a seeded LCG; common practice constants of Knuth's MMIX),
/// hypotheses as noisy copies of the first reference.
fn generated(n: usize) -> (Vec<String>, Vec<String>) {
    const SYL: [&str; 12] = ["ka", "lo", "mi", "nu", "pe", "ra", "su", "ti", "vo", "ze", "bri", "dol"];
    let mut x: u64 = 17;
    let mut next = |m: u64| {
        x = x.wrapping_mul(6364136223846793005).wrapping_add(1442695040888963407);
        (x >> 33) % m
    };
    let (mut refs, mut hyps) = (Vec::new(), Vec::new());
    for _ in 0..n {
        let len = 3 + next(12) as usize;
        let words: Vec<String> = (0..len).map(|_| format!("{}{}", SYL[next(12) as usize], SYL[next(12) as usize])).collect();
        let hyp: Vec<String> = words.iter().map(|w| if next(10) < 3 { format!("{}{}", SYL[next(12) as usize], SYL[next(12) as usize]) } else { w.clone() }).collect();
        refs.push(words.join(" "));
        hyps.push(hyp.join(" "));
    }
    (refs, hyps)
}

#[test]
fn interval_in_json_and_in_the_table() {
    let dir = TempDir::new("interval");
    let (refs, hyps) = generated(300);
    let r = dir.file("ref.txt", refs.iter().map(|l| format!("{l}\n")).collect::<String>());
    let h = dir.file("hyp.txt", hyps.iter().map(|l| format!("{l}\n")).collect::<String>());
    let base = ["score", "--ref", &r, "--hyp", &h, "--json", "--metric", "bleu", "--metric", "chrf", "--metric", "chrf++"];
    let plain = json_ok(&base, None);
    let with = |extra: &[&str]| json_ok(&[&base[..], extra].concat(), None);
    let j = with(&["--interval"]);
    for m in ["bleu", "chrf", "chrf++"] {
        let i = &j[m]["interval"];
        let (score, low, high) = (f64_of(&j[m]["score"]), f64_of(&i["low"]), f64_of(&i["high"]));
        // The point estimate is the one-shot path's, to the bit.
        assert_eq!(j[m]["score"], plain[m]["score"], "{m}");
        assert!(low < score && score < high, "{m}: {score} outside {i}");
        assert!(high - low < 25.0, "{m}: 300 segments give a range of a few points: {i}");
        assert_eq!(i["level"], 0.95);
        assert_eq!(i["resamples"], 1000);
        assert_eq!(i["seed"], 1);
        assert_eq!(i["method"], "poisson-bootstrap-percentile");
        assert!(plain[m].get("interval").is_none());
    }
    assert_eq!(j["config"]["interval"], serde_json::json!({"level": 0.95, "resamples": 1000, "method": "poisson-bootstrap-percentile", "seed": 1}));
    // Deterministic, whatever the threads; the seed and the level change it.
    assert_eq!(with(&["--interval", "--threads", "1"]), with(&["--interval", "--threads", "3"]));
    let other = with(&["--interval", "--seed", "2", "--resamples", "200", "--level", "0.9"]);
    assert_ne!(other["bleu"]["interval"]["low"], j["bleu"]["interval"]["low"]);
    assert_eq!((other["bleu"]["interval"]["resamples"].as_u64(), other["config"]["interval"]["level"].as_f64()), (Some(200), Some(0.9)));
    // 0 replicates: no interval at all.
    assert_eq!(with(&["--interval", "--resamples", "0"]), plain);
    // JSONL references with the ids plain files get (line numbers) give the same interval.
    let jl: String = refs.iter().enumerate().map(|(i, t)| jsonl_record(Value::from(i + 1), None, &[t])).collect();
    let jl = dir.file("refs.jsonl", jl);
    let from_jsonl = json_ok(&["score", "--ref", &jl, "--hyp", &h, "--json", "--metric", "bleu", "--metric", "chrf", "--metric", "chrf++", "--interval"], None);
    assert_eq!(from_jsonl["bleu"], j["bleu"]);
    assert_eq!(from_jsonl["chrf++"], j["chrf++"]);
    // The table shows the ranges.
    let out = run(&["score", "--ref", &r, "--hyp", &h, "--interval"]);
    let t = text(&out.stdout);
    assert!(t.contains("95% intervals (percentile, Poisson bootstrap over segments, 1000 resamples, seed 1)"), "{t}");
    let lo = format!("{:.2} .. {:.2}", f64_of(&j["bleu"]["interval"]["low"]), f64_of(&j["bleu"]["interval"]["high"]));
    assert!(t.lines().any(|l| l.trim_start().starts_with("BLEU") && l.contains(&lo)), "{lo} in {t}");
    assert_fails(&run(&["score", "--ref", &r, "--hyp", &h, "--interval", "--level", "1"]), &["--level"]);
    assert_fails(&run(&["score", "--ref", &r, "--hyp", &h, "--interval", "--resamples", "20001"]), &["--resamples", "20000"]);
}

// ---------------------------------------------------------------------------------------------
// demo and help
// ---------------------------------------------------------------------------------------------

#[test]
fn demo_ranks_the_best_system_first() {
    let out = run(&["demo", "--offline"]);
    assert!(out.status.success(), "{}", text(&out.stderr));
    let s = text(&out.stdout);
    // Systems as named in src/demo/mod.rs, best first.
    let systems = ["model-v8-rc", "model-v7", "fallback-dictionary"];
    let mut bleu = Vec::new();
    for name in systems {
        let start = s.lines().position(|l| l.starts_with(&format!("{name} ("))).unwrap_or_else(|| panic!("{name} missing: {s}"));
        let mut block = s.lines().skip(start + 1).take_while(|l| !l.trim().is_empty());
        let line = block.find(|l| l.trim_start().starts_with("BLEU")).unwrap_or_else(|| panic!("no BLEU for {name}"));
        let score: f64 = line.split_whitespace().nth(1).and_then(|x| x.parse().ok()).expect("BLEU score");
        assert!(score > 0.0 && score < 100.0, "{line}");
        let rest: Vec<&str> = s.lines().skip(start + 1).take_while(|l| !l.trim().is_empty()).collect();
        assert!(rest.iter().any(|l| l.trim_start().starts_with("chrF ")), "no chrF for {name}");
        assert!(rest.iter().any(|l| l.trim_start().starts_with("chrF++")), "no chrF++ for {name}");
        bleu.push(score);
    }
    assert!(bleu[0] > bleu[1] && bleu[1] > bleu[2], "BLEU by system {bleu:?}");
}

#[test]
fn demo_files_score_like_the_demo() {
    let dir = TempDir::new("demo");
    let out = run(&["demo", "--offline", "--write-files", &dir.0.to_string_lossy()]);
    assert!(out.status.success(), "{}", text(&out.stderr));
    let p = |n: &str| dir.path(n);
    let plain = json_ok(&["score", "--ref", &p("ref1.de.txt"), "--ref", &p("ref2.de.txt"), "--hyp", &p("hyp.model-v7.de.txt"), "--json"], None);
    let jsonl = json_ok(&["score", "--ref", &p("refs.jsonl"), "--hyp", &p("hyp.model-v7.de.txt"), "--json"], None);
    assert_eq!(plain["bleu"], jsonl["bleu"]);
    assert_eq!(plain["chrf"], jsonl["chrf"]);
    // The BLEU line of model-v7 in the demo output has the same score, to two decimals.
    let s = text(&out.stdout);
    let start = s.lines().position(|l| l.starts_with("model-v7 (")).expect("model-v7 block");
    let line = s.lines().skip(start + 1).find(|l| l.trim_start().starts_with("BLEU")).expect("BLEU line");
    assert!(line.contains(&format!("{:.2}", f64_of(&plain["bleu"]["score"]))), "{line} vs {}", plain["bleu"]["score"]);
}

#[test]
fn help_mentions_the_commands_and_flags() {
    let out = run(&["--help"]);
    assert!(out.status.success(), "{}", text(&out.stderr));
    let s = text(&out.stdout);
    for word in ["score", "demo", "tokenize", "--help", "--version"] {
        assert!(s.contains(word), "--help lacks {word}: {s}");
    }

    let out = run(&["score", "--help"]);
    assert!(out.status.success(), "{}", text(&out.stderr));
    let s = text(&out.stdout);
    for flag in [
        "--ref", "--hyp", "--json", "--per-segment", "--threads", "--metric", "--tokenizer", "--caseless", "--ref-format",
        "order=N", "ref-length=closest|shortest", "smoothing=", "epsilon=X", "chars=N", "words=N", "beta=B",
    ] {
        assert!(s.contains(flag), "score --help lacks {flag}");
    }
    // Unknown flags are usage errors (clap's own exit code, not success).
    let out = run(&["score", "--no-such-flag"]);
    assert!(!out.status.success());
    assert!(out.stdout.is_empty());
}

/// The one-shot path (plain references, no --per-segment) and the compiled path (taken with
/// --per-segment) print the same bytes, table and JSON, for every tokenizer and metric set, with
/// several reference files and caseless scoring; so does standard input.
#[test]
fn one_shot_and_compiled_paths_print_the_same_bytes() {
    let dir = TempDir::new("oneshot");
    let r1 = dir.file("r1.txt", lines(&["Die Fähre nach Vop legt um 9 Uhr ab.", "Deck 4 ist geschlossen", "", "Kel &amp; Zin, 3.5 km"]));
    let r2 = dir.file("r2.txt", lines(&["Die Fähre legt um 9 ab", "DECK 4 geschlossen.", "leer", "Kel und Zin 3,5 km"]));
    let hyp_text = lines(&["die Fähre nach Vop legt ab", "Deck vier ist zu", "", "Kel & Zin 3.5 km"]);
    let hyp = dir.file("hyp.txt", &hyp_text);
    let seg = dir.path("seg.jsonl");
    for tokenizer in ["whitespace", "nist", "nist-unicode", "cjk", "characters"] {
        for metrics in [&["bleu"][..], &["chrf"], &["chrf++"], &["bleu:order=2,ref-length=shortest", "chrf:chars=4,beta=1", "chrf++"]] {
            for caseless in [false, true] {
                for json in [false, true] {
                    let mut args = vec!["score", "--ref", &r1, "--ref", &r2, "--tokenizer", tokenizer];
                    for m in metrics {
                        args.extend(["--metric", m]);
                    }
                    if caseless {
                        args.push("--caseless");
                    }
                    if json {
                        args.push("--json");
                    }
                    let fast = run(&[&args[..], &["--hyp", &hyp]].concat());
                    let long = run(&[&args[..], &["--hyp", &hyp, "--per-segment", &seg]].concat());
                    let stdin = run_stdin(&[&args[..], &["--hyp", "-", "--threads", "1"]].concat(), Some(hyp_text.as_bytes()));
                    assert!(fast.status.success() && long.status.success() && stdin.status.success(), "{args:?}: {}", text(&fast.stderr));
                    assert_eq!(text(&fast.stdout), text(&long.stdout), "{args:?}");
                    assert_eq!(text(&stdin.stdout), text(&long.stdout), "{args:?} from stdin");
                }
            }
        }
    }
}

// ---------------------------------------------------------------------------------------------
// score --source: the reference-free guards
// ---------------------------------------------------------------------------------------------

// Invented ferry notices: English sources, German references, and hypotheses with one
// pathology each (a clean one, empty, the source copied, a loop, Russian where German is due).
const G_SRC: &[&str] = &[
    "The ferry to North Harbour leaves at 10:15 from pier three.",
    "Boarding at gate 4B closes ten minutes before departure.",
    "The cafe on the upper deck is closed today.",
    "Vehicles taller than two metres use lane five.",
    "Please keep your ticket until you leave the ship.",
];
const G_REF: &[&str] = &[
    "Die Fähre nach Nordhafen legt um 10:15 Uhr am Anleger drei ab.",
    "Der Einstieg an Gate 4B endet zehn Minuten vor der Abfahrt.",
    "Das Café auf dem Oberdeck ist heute geschlossen.",
    "Fahrzeuge über zwei Meter nutzen Spur fünf.",
    "Bitte behalten Sie Ihr Ticket, bis Sie das Schiff verlassen.",
];
const G_HYP: &[&str] = &[
    "Die Fähre nach Nordhafen fährt um 10:15 Uhr vom Anleger drei.",
    " . ",
    "The cafe on the upper deck is closed today.",
    "Fahrzeuge Fahrzeuge Fahrzeuge Fahrzeuge Fahrzeuge über zwei Meter.",
    "Пожалуйста, сохраните билет до выхода с судна.",
];

#[test]
fn score_with_source_reports_guards_and_per_segment_reasons() {
    let dir = TempDir::new("guards");
    let (src, r, hyp) = (dir.file("src.txt", lines(G_SRC)), dir.file("ref.txt", lines(G_REF)), dir.file("hyp.txt", lines(G_HYP)));
    let seg = dir.path("seg.jsonl");
    let v = json_ok(&["score", "--ref", &r, "--hyp", &hyp, "--source", &src, "--target-language", "de", "--per-segment", &seg, "--json"], None);
    let g = &v["guards"];
    assert_eq!(g["checked"], 5);
    assert_eq!(g["target_language"], "de");
    assert_eq!(g["length_ratio_from"], "learned");
    let flagged = |name: &str| g["by_guard"][name]["flagged"].as_u64().expect("count");
    assert_eq!(flagged("empty"), 1);
    assert_eq!(flagged("copy"), 1);
    assert_eq!(flagged("repetition"), 1);
    assert_eq!(flagged("script"), 1);
    // The rate is over the items a guard decided on: the script guard decides on the four
    // items with letters (the empty one has none).
    assert_eq!(g["by_guard"]["script"]["undecided"], 1);
    assert!(close(f64_of(&g["by_guard"]["script"]["rate"]), 0.25));
    // The learned ratio is the references' non-space characters over the sources'.
    let chars = |ls: &[&str]| ls.iter().map(|l| l.chars().filter(|c| !c.is_whitespace()).count()).sum::<usize>() as f64;
    assert!(close(f64_of(&g["length_ratio"]), chars(G_REF) / chars(G_SRC)));

    // Per segment: why each item was flagged.
    let per: Vec<Value> = std::fs::read_to_string(&seg).expect("per-segment file").lines().map(|l| serde_json::from_str(l).expect("JSON line")).collect();
    let reasons: Vec<Vec<&str>> =
        per.iter().map(|p| p["guards"]["flagged"].as_array().expect("list").iter().map(|x| x.as_str().unwrap_or("")).collect()).collect();
    assert_eq!(reasons[0], Vec::<&str>::new());
    assert!(reasons[1].contains(&"empty"));
    assert!(reasons[2].contains(&"copy"));
    assert!(reasons[3].contains(&"repetition"));
    assert!(reasons[4].contains(&"script"));

    // The human view has the block; a configured ratio is reported as not learned.
    let out = run(&["score", "--ref", &r, "--hyp", &hyp, "--source", &src, "--target-language", "deu"]);
    assert!(out.status.success(), "{}", text(&out.stderr));
    let human = text(&out.stdout);
    assert!(human.contains("guards  5 items checked against their sources, target language de"), "{human}");
    assert!(human.lines().any(|l| l.trim_start().starts_with("copy") && l.contains(" 1 flagged")), "{human}");
    let learned = format!("(expected length ratio {:.3}, learned from the references and their sources; ", chars(G_REF) / chars(G_SRC));
    assert!(human.contains(&learned), "{human}");
    let v = json_ok(&["score", "--ref", &r, "--hyp", &hyp, "--source", &src, "--guard-setting", "length-ratio=1.5", "--json"], None);
    assert_eq!(v["guards"]["length_ratio"], 1.5);
    assert_eq!(v["guards"]["length_ratio_from"], "setting");
    assert_eq!(v["guards"]["target_language"], Value::Null);
    // Without a target there is no vocabulary screen, and the reason is given.
    assert_eq!(v["guards"]["language_vocabulary"]["words"], 0);
    assert_eq!(v["guards"]["language_vocabulary"]["none_because"], "no target language declared");
    // Sources shorter than the length guard's minimum teach nothing: the default ratio (1.0).
    let v = json_ok(&["score", "--ref", &r, "--hyp", &hyp, "--source", &src, "--guard-setting", "length-min-chars=100000", "--json"], None);
    assert_eq!((v["guards"]["length_ratio"].as_f64(), v["guards"]["length_ratio_from"].as_str()), (Some(1.0), Some("default")));
    // Without --source there is no `guards` key.
    assert!(json_ok(&["score", "--ref", &r, "--hyp", &hyp, "--json"], None).get("guards").is_none());
}

#[test]
fn score_guard_errors() {
    let dir = TempDir::new("guard-errors");
    let (src, r, hyp) = (dir.file("src.txt", lines(&G_SRC[..4])), dir.file("ref.txt", lines(G_REF)), dir.file("hyp.txt", lines(G_HYP)));
    assert_fails(&run(&["score", "--ref", &r, "--hyp", &hyp, "--source", &src]), &["src.txt"]);
    let src = dir.file("src5.txt", lines(G_SRC));
    assert_fails(&run(&["score", "--ref", &r, "--hyp", &hyp, "--source", &src, "--target-language", "tlh"]), &["tlh"]);
    assert_fails(&run(&["score", "--ref", &r, "--hyp", &hyp, "--source", &src, "--guard-setting", "repeat-count=1"]), &["repeat-count"]);
}
