//! Scoring-configuration parsing: metric specs (`NAME:key=value,...`), whole configurations in
//! their one-line description, tokenizer / reference-length / smoothing names,
//! the API's `ScoreConfig` message (`config_from_pb`), and the scoring options of the command
//! line. (The TOML server configuration is parsed privately in src/cli/serve.rs; its pieces
//! with values from the outside are these.)

#![no_main]

use clap::Parser;
use libfuzzer_sys::arbitrary::Unstructured;
use libfuzzer_sys::fuzz_target;
use mtgauge::cli::{Cli, Command};
use mtgauge::metric::{MetricSpec, RefLength, ScoreConfig, Smoothing};
use mtgauge::pb;
use mtgauge::pb::convert::{config_from_pb, config_to_pb};
use mtgauge::text::Tokenizer;

const METRICS: [&str; 8] = ["bleu", "chrf", "chrf++", "chrfpp", "BLEU", " chrF ", "", "ter"];
const SPECS: [&str; 10] = [
    "bleu:order=3", "bleu:ref-length=shortest,smoothing=plus-one", "bleu:epsilon=0.05", "chrf:chars=4,beta=1", "chrf++:words=1",
    "chrf++:words=0", "bleu:chars=2", "chrf:order=2", "bleu:order=", "chrf:beta=nan",
];
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
    match s.parse::<MetricSpec>() {
        Ok(m) => {
            m.validate().expect("a parsed spec is valid");
            assert_eq!(m.to_string().parse::<MetricSpec>(), Ok(m), "a spec's full form does not parse back");
        }
        Err(e) => assert!(!e.to_string().is_empty()),
    }
    if let Ok(c) = s.parse::<ScoreConfig>() {
        c.validate().expect("a parsed configuration is valid");
        assert_eq!(c.describe().parse::<ScoreConfig>(), Ok(c), "the description does not parse back");
        let j = serde_json::to_string(&c).expect("serialize");
        assert_eq!(serde_json::from_str::<ScoreConfig>(&j).expect("deserialize"), c);
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
    let metrics = (0..n)
        .map(|_| pb::MetricConfig {
            name: name(u, &METRICS),
            order: small(u),
            ref_length: name(u, &REF_LENGTHS),
            smoothing: name(u, &SMOOTHINGS),
            epsilon: if u.ratio(1u8, 2u8).unwrap_or(true) { 0.0 } else { u.arbitrary().unwrap_or(0.0) },
            chars: small(u),
            words: small(u),
            beta: if u.ratio(1u8, 2u8).unwrap_or(true) { f64::from(small(u)) / 2.0 } else { u.arbitrary().unwrap_or(0.0) },
        })
        .collect::<Vec<_>>();
    let c = pb::ScoreConfig { metrics, tokenizer: name(u, &TOKENIZERS), caseless: u.arbitrary().unwrap_or(false) };
    match config_from_pb(Some(&c)) {
        Ok(cfg) => {
            cfg.validate().unwrap_or_else(|e| panic!("config_from_pb accepted an invalid config {cfg:?}: {e}"));
            for m in &c.metrics {
                let spec = cfg.specs().find(|s| s.metric().name() == m.name).expect("every sent metric is in the configuration");
                match spec {
                    MetricSpec::Bleu(b) => {
                        if m.order != 0 {
                            assert_eq!(b.order, m.order as usize);
                        }
                        if m.epsilon != 0.0 {
                            assert_eq!(b.epsilon, m.epsilon, "epsilon reaches the configuration");
                        }
                    }
                    MetricSpec::Chrf(_, p) => {
                        if m.beta != 0.0 {
                            assert_eq!(p.beta, m.beta);
                        }
                    }
                }
            }
            assert_eq!(cfg.caseless, c.caseless);
            // What is sent back to clients is accepted again as the same configuration.
            let back = config_to_pb(&cfg);
            assert_eq!(config_from_pb(Some(&back)).ok(), Some(cfg), "config_to_pb / config_from_pb round trip");
            let j = serde_json::to_string(&cfg).expect("serialize");
            assert_eq!(serde_json::from_str::<ScoreConfig>(&j).expect("deserialize"), cfg);
            assert_eq!(cfg.describe().parse::<ScoreConfig>(), Ok(cfg));
        }
        Err(e) => {
            let m = e.to_string();
            assert!(m.starts_with("config"), "error does not name the config field: {m}");
        }
    }
}

/// The scoring options of `mtgauge score` (parsed only; nothing is run).
fn command_line(u: &mut Unstructured<'_>) {
    let tok = name(u, &TOKENIZERS);
    let n = u.int_in_range(0..=3usize).unwrap_or(0);
    let specs: Vec<String> = (0..n)
        .map(|_| if u.ratio(3u8, 4u8).unwrap_or(true) { name(u, &SPECS) } else { format!("{}:chars={},beta={}", name(u, &METRICS), small(u), small(u)) })
        .collect();
    let mut args: Vec<&str> = vec!["mtgauge", "score", "--ref", "r.txt", "--hyp", "h.txt", "--tokenizer", &tok];
    for s in &specs {
        args.extend(["--metric", s.as_str()]);
    }
    if u.arbitrary().unwrap_or(false) {
        args.push("--caseless");
    }
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
