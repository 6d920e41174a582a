//! `mtgauge alert-bench` end to end at a reduced size: the JSON shape, a 5-point drop found by
//! every rule kind, the fixed-window test held to the rule's false alarms, `--help`, and the
//! error contract. Nothing here looks at time. The data is the benchmark's own generated
//! corpus (invented words).

use mtgauge::alerts::rules::DEFAULT_FOR_SEGMENTS;
use std::process::Command;

use serde_json::Value;

const BIN: &str = env!("CARGO_BIN_EXE_mtgauge");
/// Prefix of every error line (src/cli/mod.rs, `run`).
const ERROR_PREFIX: &str = "mtgauge: error:";
/// Trials per drop in the reduced run.
const TRIALS: u64 = 3;
/// Stable segments in the reduced run.
const SEGMENTS: u64 = 20_000;

fn reduced_run() -> Value {
    let out = Command::new(BIN)
        .args(["alert-bench", "--json", "--segments", &SEGMENTS.to_string(), "--trials", &TRIALS.to_string()])
        .args(["--drops", "5", "--points", "2", "--ref-items", "2000", "--calibration-segments", "4000", "--cap", "6000", "--threads", "2"])
        .output()
        .expect("run mtgauge alert-bench");
    assert!(out.status.success(), "{}", String::from_utf8_lossy(&out.stderr));
    assert!(out.stderr.is_empty(), "--json prints no progress: {}", String::from_utf8_lossy(&out.stderr));
    serde_json::from_slice(&out.stdout).expect("one JSON object")
}

#[test]
fn a_reduced_run_finds_a_five_point_drop_with_every_rule_kind() {
    let f = reduced_run();
    let s = &f["settings"];
    // Defaults: 10 segments/s x 5 s per evaluation; for-duration 200 segments and no seconds
    // (src/alerts/rules.rs, DEFAULT_EVAL_SECONDS, DEFAULT_FOR_SEGMENTS, DEFAULT_FOR_SECONDS).
    assert_eq!((s["segments_per_evaluation"].as_u64(), s["for_segments"].as_u64(), s["for_seconds"].as_u64()), (Some(50), Some(DEFAULT_FOR_SEGMENTS), Some(0)));
    assert_eq!((s["stable_segments"].as_u64(), s["trials_per_drop"].as_u64(), s["resamples"].as_u64(), s["recent_window"].as_u64()), (Some(SEGMENTS), Some(TRIALS), Some(200), Some(1000)));
    // The degraded system is calibrated to 5 points and measured on another sample of 4000
    // segments: the standard error of a BLEU difference there is about 0.4 points (measured
    // in this benchmark's unit test at 20,000 segments and scaled by sqrt(5)); 1.5 points is
    // over three of them (common practice).
    let d = &f["systems"]["degraded"][0];
    assert_eq!(d["target"].as_f64(), Some(5.0));
    let measured = d["measured_drop"].as_f64().unwrap();
    assert!((measured - 5.0).abs() < 1.5, "measured drop {measured}");
    assert!(d["extra_replace"].as_f64().unwrap() > 0.0);

    let rules = f["rules"].as_array().unwrap();
    let kinds: Vec<&str> = rules.iter().map(|r| r["kind"].as_str().unwrap()).collect();
    assert_eq!(kinds, ["below", "drop", "decline"]);
    for r in rules {
        let name = r["name"].as_str().unwrap();
        assert_eq!(r["points"].as_f64(), Some(2.0), "{name}");
        assert!(r["config"].as_str().unwrap().contains("session = \"candidate\""), "{name}: {}", r["config"]);
        let alarms = r["stable"]["false_alerts"].as_u64().unwrap();
        assert_eq!(r["stable"]["per_million_segments"].as_f64().unwrap(), alarms as f64 * 1e6 / SEGMENTS as f64, "{name}");
        let drop = &r["drops"][0];
        let rule = &drop["rule"];
        assert_eq!(rule["trials"].as_u64().unwrap() + rule["fired_before_switch"].as_u64().unwrap(), TRIALS, "{name}");
        // A 5-point drop is found by every rule within the cap of 6000 segments, and not before
        // the for-duration has passed: the first evaluation where the condition holds has seen
        // at least one degraded segment, and a below or drop alert fires DEFAULT_FOR_SEGMENTS
        // segments after it; a decline alert needs a chunk with degraded segments.
        assert!(rule["detected"].as_u64().unwrap() >= 2, "{name}: {rule}");
        let median = rule["median"].as_u64().unwrap_or_else(|| panic!("{name}: the 5-point drop is not found: {rule}"));
        let least = if r["kind"] == "decline" { 0 } else { DEFAULT_FOR_SEGMENTS };
        assert!(median > least && median <= 6000, "{name}: median {median}");
        // The fixed-window test beside it: one row per window size, each held to at most the
        // rule's false alarms on the same stable windows, the best among them reported.
        let fixed = drop["fixed_window"].as_array().unwrap();
        assert!(!fixed.is_empty());
        for w in fixed {
            assert!(w["false_alarms"].as_u64().unwrap() <= alarms, "{name}: {w}");
            assert_eq!(w["stable_windows"].as_u64().unwrap(), 2 * (SEGMENTS / 2 / w["window"].as_u64().unwrap()), "{name}: two streams of {} segments: {w}", SEGMENTS / 2);
        }
        let best = &drop["fixed_window_best"];
        assert!(fixed.iter().any(|w| w == best), "{name}: the best is one of the rows");
        let key = |w: &Value| w["delays"]["median"].as_u64().unwrap_or(u64::MAX);
        assert!(fixed.iter().all(|w| key(best) <= key(w)), "{name}: the best has the smallest median delay");
    }
}

#[test]
fn help_teaches_what_is_measured_and_bad_options_fail_with_one_line() {
    let out = Command::new(BIN).args(["alert-bench", "--help"]).output().unwrap();
    assert!(out.status.success());
    let help = String::from_utf8_lossy(&out.stdout);
    for want in ["false alerts", "for-duration", "evaluations at the default rate", "10,000,000", "fixed-window test", "--rate", "--cap", "Runtime"] {
        assert!(help.contains(want), "--help lacks {want:?}:\n{help}");
    }
    for args in [&["--ref-items", "10"][..], &["--drops", "0"], &["--points", "150"], &["--rate", "0"]] {
        let out = Command::new(BIN).arg("alert-bench").args(args).output().unwrap();
        assert_eq!(out.status.code(), Some(2), "{args:?}");
        let err = String::from_utf8_lossy(&out.stderr);
        assert!(err.starts_with(ERROR_PREFIX) && err.lines().count() == 1, "{args:?}: {err}");
    }
}

#[test]
fn the_human_table_names_every_rule_and_the_cadence() {
    let out = Command::new(BIN)
        .args(["alert-bench", "--segments", "3000", "--trials", "1", "--drops", "5", "--points", "2", "--ref-items", "1000", "--calibration-segments", "1000", "--cap", "1000"])
        .output()
        .unwrap();
    assert!(out.status.success(), "{}", String::from_utf8_lossy(&out.stderr));
    let text = String::from_utf8_lossy(&out.stdout);
    let for_duration = format!("for-duration {DEFAULT_FOR_SEGMENTS} segments");
    for want in ["every 50 segments", &for_duration, "degraded by 5.0 points", "measured drop", "below-2", "drop-2", "decline-2", "false/10^6", "median / p90"] {
        assert!(text.contains(want), "the table lacks {want:?}:\n{text}");
    }
    assert!(String::from_utf8_lossy(&out.stderr).contains("stable run"), "progress goes to stderr");
}
