//! Scoring-configuration parsing: metric lists, tokenizer / reference-length / smoothing names,
//! the API's `ScoreConfig` message (`config_from_pb`), and the scoring options of the command
//! line. (The TOML server configuration is parsed privately in src/cli/serve.rs; its pieces
//! with values from the outside are these.)

#![no_main]

use clap::Parser;
use libfuzzer_sys::arbitrary::Unstructured;
use libfuzzer_sys::fuzz_target;
use mtgauge::cli::{Cli, Command};
use mtgauge::metric::{MetricSet, RefLength, ScoreConfig, Smoothing};
use mtgauge::pb;
use mtgauge::server::convert::{config_from_pb, config_to_pb};
use mtgauge::text::Tokenizer;

const METRICS: [&str; 8] = ["bleu", "chrf", "chrf++", "chrfpp", "BLEU", " chrF ", "", "ter"];
const TOKENIZERS: [&str; 7] = ["nist", "nist-unicode", "cjk", "whitespace", "characters", "", "Nist"];
const REF_LENGTHS: [&str; 4] = ["closest", "shortest", "", "longest"];
const SMOOTHINGS: [&str; 6] = ["none", "epsilon", "plus-one", "nist-halving", "", "add-k"];

/// A name: usually one of `known`, sometimes arbitrary text.
fn name(u: &mut Unstructured<'_>, known: &[&str]) -> String {
    if u.ratio(3u8, 4u8).unwrap_or(true) {
        u.choose(known).map(|s| s.to_string()).unwrap_or_default()
    } else {
        u.arbitrary().unwrap_or_default()
    }
}

/// A small number, usually near the valid ranges.
fn small(u: &mut Unstructured<'_>) -> u32 {
    if u.ratio(7u8, 8u8).unwrap_or(true) {
        u.int_in_range(0..=12u32).unwrap_or(0)
    } else {
        u.arbitrary().unwrap_or(0)
    }
}

fn names(s: &str) {
    match s.parse::<MetricSet>() {
        Ok(m) => {
            assert_ne!(m, MetricSet::default(), "{s:?} parsed to no metric");
            assert_eq!(m.to_string().parse::<MetricSet>(), Ok(m), "metric set display does not parse back");
            let j = serde_json::to_string(&m).expect("serialize");
            assert_eq!(serde_json::from_str::<MetricSet>(&j).expect("deserialize"), m);
        }
        Err(e) => assert!(!e.to_string().is_empty()),
    }
    match s.parse::<Tokenizer>() {
        Ok(t) => assert_eq!(t.name(), s),
        Err(e) => assert_eq!(e.0, s),
    }
    if let Ok(r) = s.parse::<RefLength>() {
        assert_eq!(r.name(), s);
    }
    if let Ok(m) = s.parse::<Smoothing>() {
        assert_eq!(m.name(), s);
    }
}

fn message(u: &mut Unstructured<'_>) {
    let n = u.int_in_range(0..=3usize).unwrap_or(0);
    let c = pb::ScoreConfig {
        metrics: (0..n).map(|_| name(u, &METRICS)).collect(),
        tokenizer: name(u, &TOKENIZERS),
        lowercase: u.arbitrary().unwrap_or(false),
        bleu_order: small(u),
        ref_length: name(u, &REF_LENGTHS),
        smoothing: name(u, &SMOOTHINGS),
        chrf_char_order: small(u),
        chrf_word_order: small(u),
        chrf_beta: if u.ratio(1u8, 2u8).unwrap_or(true) { f64::from(small(u)) / 2.0 } else { u.arbitrary().unwrap_or(0.0) },
    };
    match config_from_pb(Some(&c)) {
        Ok(cfg) => {
            cfg.validate().unwrap_or_else(|e| panic!("config_from_pb accepted an invalid config {cfg:?}: {e}"));
            if c.bleu_order != 0 {
                assert_eq!(cfg.bleu_order, c.bleu_order as usize);
            }
            if c.chrf_beta != 0.0 {
                assert_eq!(cfg.beta, c.chrf_beta);
            }
            assert_eq!(cfg.lowercase, c.lowercase);
            // What is sent back to clients is accepted again as the same configuration.
            let back = config_to_pb(&cfg);
            assert_eq!(config_from_pb(Some(&back)).ok(), Some(cfg), "config_to_pb / config_from_pb round trip");
            let j = serde_json::to_string(&cfg).expect("serialize");
            assert_eq!(serde_json::from_str::<ScoreConfig>(&j).expect("deserialize"), cfg);
            assert!(!cfg.describe().is_empty());
        }
        Err(e) => {
            let m = e.to_string();
            assert!(m.starts_with("config"), "error does not name the config field: {m}");
        }
    }
}

/// The scoring options of `mtgauge score` (parsed only; nothing is run).
fn command_line(u: &mut Unstructured<'_>) {
    let metrics = name(u, &METRICS);
    let tok = name(u, &TOKENIZERS);
    let (order, chars, words) = (small(u).to_string(), small(u).to_string(), small(u).to_string());
    let beta: String = if u.ratio(1u8, 2u8).unwrap_or(true) { u.choose(&["2", "0", "-1", "nan", "inf", "1e308"]).copied().unwrap_or("2").into() } else { u.arbitrary().unwrap_or_default() };
    let (rl, sm) = (name(u, &REF_LENGTHS), name(u, &SMOOTHINGS));
    let args = [
        "mtgauge", "score", "--ref", "r.txt", "--hyp", "h.txt", "--metrics", &metrics, "--tokenize", &tok, "--bleu-order", &order, "--chrf-char-order", &chars,
        "--chrf-word-order", &words, "--chrf-beta", &beta, "--ref-length", &rl, "--smoothing", &sm,
    ];
    if let Ok(Cli { command: Command::Score(a) }) = Cli::try_parse_from(args) {
        if let Ok(cfg) = a.scoring.config() {
            cfg.validate().expect("the command line accepted an invalid config");
        }
    }
}

fuzz_target!(|data: &[u8]| {
    names(&String::from_utf8_lossy(data));
    assert_eq!(config_from_pb(None).ok(), Some(ScoreConfig::default()));
    let mut u = Unstructured::new(data);
    message(&mut u);
    command_line(&mut u);
});
