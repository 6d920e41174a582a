//! Logs (tracing) and Prometheus metrics: every metric name, its help text and its buckets live
//! here, in one place.

use std::collections::BTreeMap;
use std::net::SocketAddr;

use metrics::{counter, gauge, histogram, describe_counter, describe_gauge, describe_histogram, Unit};
use metrics_exporter_prometheus::{Matcher, PrometheusBuilder, PrometheusHandle};

use crate::metric::scores::corpus_score;
use crate::metric::{CorpusStats, Metric, ScoreConfig};

/// Buckets of `mtgauge_batch_seconds` (seconds; common practice for request latencies).
pub const BATCH_SECONDS_BUCKETS: &[f64] = &[0.0005, 0.001, 0.0025, 0.005, 0.01, 0.025, 0.05, 0.1, 0.25, 0.5, 1.0, 2.5];

const SEGMENTS: &str = "mtgauge_segments_total";
const BLEU_MATCHES: &str = "mtgauge_bleu_matches_total";
const BLEU_NGRAMS: &str = "mtgauge_bleu_ngrams_total";
const HYP_TOKENS: &str = "mtgauge_hypothesis_tokens_total";
const REF_TOKENS: &str = "mtgauge_reference_tokens_total";
const CHRF_MATCHES: &str = "mtgauge_chrf_matches_total";
const CHRF_HYP: &str = "mtgauge_chrf_hypothesis_ngrams_total";
const CHRF_REF: &str = "mtgauge_chrf_reference_ngrams_total";
const SCORE: &str = "mtgauge_score";
const SESSION_INFO: &str = "mtgauge_session_info";
const REFSET_SEGMENTS: &str = "mtgauge_refset_segments";
const REFSET_BYTES: &str = "mtgauge_refset_bytes";
const ACTIVE_STREAMS: &str = "mtgauge_active_streams";
const BUILD_INFO: &str = "mtgauge_build_info";
const BATCH_SECONDS: &str = "mtgauge_batch_seconds";
const CONNECTIONS_OPEN: &str = "mtgauge_connections_open";
const CONNECTIONS_ACCEPTED: &str = "mtgauge_connections_accepted_total";
const CONNECTIONS_REFUSED: &str = "mtgauge_connections_refused_total";
const CONNECTIONS_IDLE_CLOSED: &str = "mtgauge_connections_idle_closed_total";
const WATCH_SKIPPED: &str = "mtgauge_watch_reports_skipped_total";
const WATCH_DROPPED: &str = "mtgauge_watch_subscribers_dropped_total";
const METRICS_REFUSED: &str = "mtgauge_metrics_requests_refused_total";
const ALERT_FIRING: &str = "mtgauge_alert_firing";
const ALERT_STATE: &str = "mtgauge_alert_state";
const REP_SEGMENTS: &str = "mtgauge_replicate_segments_total";
const REP_BLEU_MATCHES: &str = "mtgauge_replicate_bleu_matches_total";
const REP_BLEU_NGRAMS: &str = "mtgauge_replicate_bleu_ngrams_total";
const REP_HYP_TOKENS: &str = "mtgauge_replicate_hypothesis_tokens_total";
const REP_REF_TOKENS: &str = "mtgauge_replicate_reference_tokens_total";
const REP_CHRF_MATCHES: &str = "mtgauge_replicate_chrf_matches_total";
const REP_CHRF_HYP: &str = "mtgauge_replicate_chrf_hypothesis_ngrams_total";
const REP_CHRF_REF: &str = "mtgauge_replicate_chrf_reference_ngrams_total";
const ALERT_DELIVERIES: &str = "mtgauge_alert_deliveries_total";
const ALERT_RETRIES: &str = "mtgauge_alert_delivery_retries_total";
const GUARD_CHECKED: &str = "mtgauge_guard_checked_total";
const GUARD_FLAGGED: &str = "mtgauge_guard_flagged_total";
const GUARD_UNDECIDED: &str = "mtgauge_guard_undecided_total";
const EXTERNAL_COUNT: &str = "mtgauge_external_count_total";
const EXTERNAL_SUM: &str = "mtgauge_external_sum_total";
const EXTERNAL_SQUARES: &str = "mtgauge_external_squares_total";
const EXTERNAL_LOW: &str = "mtgauge_external_low";
const EXTERNAL_SCALE: &str = "mtgauge_external_scale";
const COMMIT_SECONDS: &str = "mtgauge_store_commit_seconds";
const COMMIT_BATCHES: &str = "mtgauge_store_commit_batches";

/// Buckets of `mtgauge_store_commit_seconds` (seconds; one group's apply, write and sync).
pub const COMMIT_SECONDS_BUCKETS: &[f64] = &[0.0001, 0.00025, 0.0005, 0.001, 0.0025, 0.005, 0.01, 0.025, 0.05, 0.1, 0.25, 1.0];
/// Buckets of `mtgauge_store_commit_batches` (batches in one group commit).
pub const COMMIT_BATCHES_BUCKETS: &[f64] = &[1.0, 2.0, 4.0, 8.0, 16.0, 32.0, 64.0, 128.0, 256.0];

/// Bootstrap replicates per session exported to Prometheus unless configured (the first ones
/// of the session's replicates; 0 exports none).
pub const DEFAULT_EXPORTED_RESAMPLES: usize = 100;

/// Every metric the server exports (what `serve --show-config` lists for dashboards and rules).
pub const METRIC_NAMES: [&str; 44] = [
    SEGMENTS,
    BLEU_MATCHES,
    BLEU_NGRAMS,
    HYP_TOKENS,
    REF_TOKENS,
    CHRF_MATCHES,
    CHRF_HYP,
    CHRF_REF,
    SCORE,
    SESSION_INFO,
    REFSET_SEGMENTS,
    REFSET_BYTES,
    ACTIVE_STREAMS,
    BUILD_INFO,
    BATCH_SECONDS,
    CONNECTIONS_OPEN,
    CONNECTIONS_ACCEPTED,
    CONNECTIONS_REFUSED,
    CONNECTIONS_IDLE_CLOSED,
    WATCH_SKIPPED,
    WATCH_DROPPED,
    METRICS_REFUSED,
    ALERT_FIRING,
    ALERT_STATE,
    REP_SEGMENTS,
    REP_BLEU_MATCHES,
    REP_BLEU_NGRAMS,
    REP_HYP_TOKENS,
    REP_REF_TOKENS,
    REP_CHRF_MATCHES,
    REP_CHRF_HYP,
    REP_CHRF_REF,
    ALERT_DELIVERIES,
    ALERT_RETRIES,
    COMMIT_SECONDS,
    COMMIT_BATCHES,
    GUARD_CHECKED,
    GUARD_FLAGGED,
    GUARD_UNDECIDED,
    EXTERNAL_COUNT,
    EXTERNAL_SUM,
    EXTERNAL_SQUARES,
    EXTERNAL_LOW,
    EXTERNAL_SCALE,
];

/// The replicate families: name, help, and the labels after `session` and `replicate`.
const REPLICATE_FAMILIES: [(&str, &str); 8] = [
    (REP_SEGMENTS, "Per session and bootstrap replicate: the summed Poisson(1) weights of its segments (the replicate's segment count)."),
    (REP_BLEU_MATCHES, "Per session, bootstrap replicate and order: weighted BLEU clipped matches (sum over replicas, then derive each replicate's BLEU)."),
    (REP_BLEU_NGRAMS, "Per session, bootstrap replicate and order: weighted BLEU hypothesis n-grams."),
    (REP_HYP_TOKENS, "Per session and bootstrap replicate: weighted BLEU hypothesis tokens."),
    (REP_REF_TOKENS, "Per session and bootstrap replicate: weighted BLEU effective reference tokens."),
    (REP_CHRF_MATCHES, "Per session, bootstrap replicate, metric, kind and order: weighted chrF matches."),
    (REP_CHRF_HYP, "Per session, bootstrap replicate, metric, kind and order: weighted chrF hypothesis n-grams."),
    (REP_CHRF_REF, "Per session, bootstrap replicate, metric, kind and order: weighted chrF reference n-grams."),
];

/// The per-replicate counters of sessions' cumulative replicate sums, in the Prometheus text
/// format: the first `exported` replicates of each (session, config, sums). Rendered at scrape
/// time from the sums themselves (no per-batch cost). Series per session: `exported` x (1 +
/// (2 order + 2) for BLEU + 3 (chars + words) per chrF metric).
pub fn render_replicates(sessions: &[(String, ScoreConfig, crate::metric::resample::Replicates)], exported: usize) -> String {
    use std::fmt::Write;
    let mut fam: Vec<String> = REPLICATE_FAMILIES.iter().map(|(name, help)| format!("# HELP {name} {help}\n# TYPE {name} counter\n")).collect();
    let mut any = vec![false; fam.len()];
    for (session, config, reps) in sessions {
        let session = escape_label(session);
        for r in 0..exported.min(reps.resamples()) {
            let st = reps.replicate(r);
            let mut put = |i: usize, labels: &str, v: u64| {
                any[i] = true;
                let _ = writeln!(fam[i], "{}{{session=\"{session}\",replicate=\"{r}\"{labels}}} {v}", REPLICATE_FAMILIES[i].0);
            };
            put(0, "", st.segments);
            if let Some(b) = config.metrics.bleu {
                for n in 0..b.order {
                    let l = format!(",order=\"{}\"", n + 1);
                    put(1, &l, st.bleu.matches[n]);
                    put(2, &l, st.bleu.totals[n]);
                }
                put(3, "", st.bleu.hyp_len);
                put(4, "", st.bleu.ref_len);
            }
            for (metric, p) in config.chrf_family() {
                let c = if metric == Metric::ChrfPlusPlus { &st.chrfpp } else { &st.chrf };
                for (kind, counts, orders) in [("chars", &c.char, p.chars), ("words", &c.word, p.words)] {
                    for n in 0..orders {
                        let l = format!(",metric=\"{}\",kind=\"{kind}\",order=\"{}\"", metric.name(), n + 1);
                        put(5, &l, counts.matches[n]);
                        put(6, &l, counts.hyp[n]);
                        put(7, &l, counts.reference[n]);
                    }
                }
            }
        }
    }
    fam.into_iter().zip(any).filter(|(_, a)| *a).map(|(f, _)| f).collect()
}

/// A label value in the text format: backslash, double quote and line feed escaped.
fn escape_label(v: &str) -> String {
    v.replace('\\', "\\\\").replace('"', "\\\"").replace('\n', "\\n")
}

/// Install the process-wide Prometheus recorder and describe every metric.
pub fn install_metrics() -> Result<PrometheusHandle, String> {
    let recorder = PrometheusBuilder::new()
        .set_buckets_for_metric(Matcher::Full(BATCH_SECONDS.into()), BATCH_SECONDS_BUCKETS)
        .map_err(|e| e.to_string())?
        .set_buckets_for_metric(Matcher::Full(COMMIT_SECONDS.into()), COMMIT_SECONDS_BUCKETS)
        .map_err(|e| e.to_string())?
        .set_buckets_for_metric(Matcher::Full(COMMIT_BATCHES.into()), COMMIT_BATCHES_BUCKETS)
        .map_err(|e| e.to_string())?
        .build_recorder();
    let handle = recorder.handle();
    metrics::set_global_recorder(recorder).map_err(|e| e.to_string())?;
    describe_counter!(SEGMENTS, "Items received per session by outcome: scored, unknown (no such segment), rejected (invalid).");
    describe_counter!(BLEU_MATCHES, "BLEU clipped n-gram matches per session and order (additive: sum over replicas, then derive BLEU).");
    describe_counter!(BLEU_NGRAMS, "BLEU hypothesis n-grams per session and order.");
    describe_counter!(HYP_TOKENS, "BLEU hypothesis length in tokens per session.");
    describe_counter!(REF_TOKENS, "BLEU effective reference length in tokens per session.");
    describe_counter!(CHRF_MATCHES, "chrF n-gram matches per session, metric (chrf, chrf++), kind (chars, words) and order.");
    describe_counter!(CHRF_HYP, "chrF hypothesis n-grams per session, metric, kind and order.");
    describe_counter!(CHRF_REF, "chrF reference n-grams per session, metric, kind and order.");
    describe_gauge!(SCORE, "Score (0-100) per session, metric and window (cumulative, recent), derived from this replica's statistics.");
    describe_gauge!(SESSION_INFO, "Constant 1 per live session, with its reference set, digest, configuration, resampling (replicates and seed of its intervals) and labels.");
    describe_gauge!(REFSET_SEGMENTS, "Segments of each loaded reference set.");
    describe_gauge!(REFSET_BYTES, Unit::Bytes, "Memory of each loaded reference set's text.");
    describe_gauge!(ACTIVE_STREAMS, "Scoring streams open now.");
    describe_gauge!(BUILD_INFO, "Constant 1, labelled with the mtgauge version.");
    describe_histogram!(BATCH_SECONDS, Unit::Seconds, "Time from receiving a batch to its acknowledgement.");
    describe_histogram!(COMMIT_SECONDS, Unit::Seconds, "Durable mode: time of one group commit (apply the group's batches, write them in one transaction, sync), without the gathering wait.");
    describe_histogram!(COMMIT_BATCHES, "Durable mode: batches written by one group commit (one transaction).");
    describe_gauge!(CONNECTIONS_OPEN, "Connections open now per listener (grpc, health); at most limits.max_connections.");
    describe_counter!(CONNECTIONS_ACCEPTED, "Connections accepted per listener.");
    describe_counter!(CONNECTIONS_REFUSED, "Connections refused (RESOURCE_EXHAUSTED, then closed) because limits.max_connections were open.");
    describe_counter!(CONNECTIONS_IDLE_CLOSED, "Connections closed after nothing was received for limits.connection_idle_seconds.");
    describe_counter!(WATCH_SKIPPED, "Watch reports not sent because the subscriber had not taken the previous one (slow subscribers skip, never queue).");
    describe_counter!(WATCH_DROPPED, "Watch subscribers the server ended: `reason` stalled (left too many reports unread) or closed (went away).");
    describe_counter!(METRICS_REFUSED, "Scrape connections closed on arrival because too many were open.");
    describe_counter!(ALERT_DELIVERIES, "Alert events per delivery target by outcome: sent (accepted), failed (refused with a 4xx, or out of attempts), dropped (pushed out of a full queue).");
    describe_counter!(GUARD_CHECKED, "Items checked by the reference-free guards per session (items that carried a source, matched or not).");
    describe_counter!(GUARD_FLAGGED, "Items flagged per session and guard (empty, copy, length, repetition, script, language); an item can trip several.");
    describe_counter!(GUARD_UNDECIDED, "Items a guard could not decide on per session and guard (too short, no declared target, ...): checked minus undecided is what a guard's flagged share is of.");
    describe_counter!(EXTERNAL_COUNT, "Values of each external segment metric counted per session (the metric label is the session's declared name).");
    describe_counter!(EXTERNAL_SUM, "Per session and external metric: the sum of (value - low) x 10^decimals, exact (low and decimals as declared; fleet mean = low + sum / (count x 10^decimals)).");
    describe_gauge!(EXTERNAL_LOW, "Per session and external metric: the declared low end of its range, which the sum and squares counters are offset by.");
    describe_gauge!(EXTERNAL_SCALE, "Per session and external metric: 10^decimals, the fixed-point scale of its sum and squares counters.");
    describe_counter!(EXTERNAL_SQUARES, "Per session and external metric: the sum of (value - low)^2 x 10^decimals, rounded half to even over the whole sum (variance = (squares / 10^decimals - sum^2 / (count x 10^(2 decimals))) / (count - 1)).");
    describe_counter!(ALERT_RETRIES, "Alert delivery attempts after the first one of a batch, per target.");
    describe_gauge!(ALERT_FIRING, "1 while the daemon's alert rule fires for the session, else 0.");
    describe_gauge!(ALERT_STATE, "1 for the state (inactive, pending, firing) the daemon's alert rule is in for the session, 0 for the others.");
    for l in ["grpc", "health"] {
        gauge!(CONNECTIONS_OPEN, "listener" => l).set(0.0);
        counter!(CONNECTIONS_ACCEPTED, "listener" => l).absolute(0);
        counter!(CONNECTIONS_REFUSED, "listener" => l).absolute(0);
        counter!(CONNECTIONS_IDLE_CLOSED, "listener" => l).absolute(0);
    }
    counter!(WATCH_SKIPPED).absolute(0);
    for reason in ["stalled", "closed"] {
        counter!(WATCH_DROPPED, "reason" => reason).absolute(0);
    }
    counter!(METRICS_REFUSED).absolute(0);
    gauge!(BUILD_INFO, "version" => env!("CARGO_PKG_VERSION")).set(1.0);
    Ok(handle)
}

/// Count one applied batch: its outcome counts and the summed statistics of its scored items.
pub fn record_batch(session: &str, config: &ScoreConfig, scored: u64, unknown: u64, rejected: u64, sum: &CorpusStats) {
    counters(session, config, [scored, unknown, rejected], sum, false);
}

/// Publish a session's counters at the given values: at creation (zeros, so that `increase()`
/// sees the first batch) and after a restart (the durable totals, so that the counters go on
/// from where the last process left them).
pub fn init_session(session: &str, config: &ScoreConfig, counts: [u64; 3], cumulative: &CorpusStats) {
    counters(session, config, counts, cumulative, true);
}

/// Add to (or, with `absolute`, set) every counter of a session.
fn counters(session: &str, config: &ScoreConfig, counts: [u64; 3], sum: &CorpusStats, absolute: bool) {
    let put = |c: metrics::Counter, v: u64| if absolute { c.absolute(v) } else { c.increment(v) };
    let [scored, unknown, rejected] = counts;
    let s = session.to_owned();
    for (outcome, n) in [("scored", scored), ("unknown", unknown), ("rejected", rejected)] {
        put(counter!(SEGMENTS, "session" => s.clone(), "outcome" => outcome), n);
    }
    if let Some(b) = config.metrics.bleu {
        for n in 0..b.order {
            let order = (n + 1).to_string();
            put(counter!(BLEU_MATCHES, "session" => s.clone(), "order" => order.clone()), sum.bleu.matches[n]);
            put(counter!(BLEU_NGRAMS, "session" => s.clone(), "order" => order), sum.bleu.totals[n]);
        }
        put(counter!(HYP_TOKENS, "session" => s.clone()), sum.bleu.hyp_len);
        put(counter!(REF_TOKENS, "session" => s.clone()), sum.bleu.ref_len);
    }
    for (metric, p) in config.chrf_family() {
        let st = if metric == Metric::ChrfPlusPlus { &sum.chrfpp } else { &sum.chrf };
        for (kind, counts, orders) in [("chars", &st.char, p.chars), ("words", &st.word, p.words)] {
            for n in 0..orders {
                let order = (n + 1).to_string();
                let labels = [("session", s.clone()), ("metric", metric.name().to_owned()), ("kind", kind.to_owned()), ("order", order)];
                put(counter!(CHRF_MATCHES, &labels), counts.matches[n]);
                put(counter!(CHRF_HYP, &labels), counts.hyp[n]);
                put(counter!(CHRF_REF, &labels), counts.reference[n]);
            }
        }
    }
}

/// Add a batch's guard counts to a session's counters (with `absolute`, set them: at creation
/// and after a restart, from the durable totals).
pub fn record_guards(session: &str, counts: &crate::guard::GuardCounts, absolute: bool) {
    let put = |c: metrics::Counter, v: u64| if absolute { c.absolute(v) } else { c.increment(v) };
    put(counter!(GUARD_CHECKED, "session" => session.to_owned()), counts.checked);
    for g in crate::guard::Guard::ALL {
        put(counter!(GUARD_FLAGGED, "session" => session.to_owned(), "guard" => g.name()), counts.flagged_by(g));
        put(counter!(GUARD_UNDECIDED, "session" => session.to_owned(), "guard" => g.name()), counts.undecided_by(g));
    }
}

/// Set a session's external metric counters from its cumulative external sums (after each
/// batch, at creation and after a restart: derived from the sums, they never go backwards).
pub fn record_external(session: &str, declaration: &crate::external::Declaration, totals: &crate::external::ExternalTotals) {
    for (spec, sums) in declaration.specs().iter().zip(&totals.0) {
        let (n, sum, squares) = crate::external::exported_counters(spec, sums);
        let labels = [("session", session.to_owned()), ("metric", spec.name.clone())];
        counter!(EXTERNAL_COUNT, &labels).absolute(n);
        counter!(EXTERNAL_SUM, &labels).absolute(sum);
        counter!(EXTERNAL_SQUARES, &labels).absolute(squares);
        gauge!(EXTERNAL_LOW, &labels).set(spec.low);
        gauge!(EXTERNAL_SCALE, &labels).set(spec.scale() as f64);
    }
}

/// Set the score gauges of a session from its cumulative and recent statistics.
pub fn record_scores(session: &str, config: &ScoreConfig, cumulative: &CorpusStats, recent: &CorpusStats) {
    for (window, st) in [("cumulative", cumulative), ("recent", recent)] {
        for metric in config.metric_list() {
            if let Some(value) = corpus_score(st, config, metric) {
                gauge!(SCORE, "session" => session.to_owned(), "metric" => metric.name(), "window" => window).set(value);
            }
        }
    }
}

/// Publish (or re-publish) a session's info series; `config` is the scoring configuration as
/// one string, so that replicas running a session differently can be told apart.
pub fn record_session_info(session: &str, refset: &str, digest: &str, config: &str, resampling: &str, labels: &BTreeMap<String, String>, live: bool) {
    let mut l = vec![
        ("session".to_owned(), session.to_owned()),
        ("refset".to_owned(), refset.to_owned()),
        ("digest".to_owned(), digest.to_owned()),
        ("config".to_owned(), config.to_owned()),
        ("resampling".to_owned(), resampling.to_owned()),
    ];
    l.extend(labels.iter().map(|(k, v)| (k.clone(), v.clone())));
    gauge!(SESSION_INFO, &l).set(if live { 1.0 } else { 0.0 });
}

/// Publish the state of an alert rule on a session.
pub fn record_alert(rule: &str, session: &str, state: &str, states: &[&'static str]) {
    gauge!(ALERT_FIRING, "rule" => rule.to_owned(), "session" => session.to_owned()).set(if state == "firing" { 1.0 } else { 0.0 });
    for s in states {
        gauge!(ALERT_STATE, "rule" => rule.to_owned(), "session" => session.to_owned(), "state" => *s).set(if *s == state { 1.0 } else { 0.0 });
    }
}

/// Publish a reference set's size.
pub fn record_refset(name: &str, segments: usize, bytes: usize) {
    gauge!(REFSET_SEGMENTS, "refset" => name.to_owned()).set(segments as f64);
    gauge!(REFSET_BYTES, "refset" => name.to_owned()).set(bytes as f64);
}

/// One more (or one fewer) open scoring stream.
pub fn streams_delta(delta: f64) {
    gauge!(ACTIVE_STREAMS).increment(delta);
}

/// A scrape connection was closed on arrival because too many were open.
pub fn scrape_refused() {
    counter!(METRICS_REFUSED).increment(1);
}

/// A connection was accepted on a listener.
pub fn connection_opened(listener: &'static str) {
    counter!(CONNECTIONS_ACCEPTED, "listener" => listener).increment(1);
    gauge!(CONNECTIONS_OPEN, "listener" => listener).increment(1.0);
}

/// An accepted connection ended.
pub fn connection_closed(listener: &'static str) {
    gauge!(CONNECTIONS_OPEN, "listener" => listener).decrement(1.0);
}

/// A connection was closed on arrival (limit reached).
pub fn connection_refused(listener: &'static str) {
    counter!(CONNECTIONS_REFUSED, "listener" => listener).increment(1);
}

/// A connection was closed for silence.
pub fn connection_idle_closed(listener: &'static str) {
    counter!(CONNECTIONS_IDLE_CLOSED, "listener" => listener).increment(1);
}

/// A watch report was skipped for a slow subscriber.
pub fn watch_report_skipped() {
    counter!(WATCH_SKIPPED).increment(1);
}

/// A watch subscriber was ended by the server; `reason`: "stalled" or "closed".
pub fn watch_subscriber_dropped(reason: &'static str) {
    counter!(WATCH_DROPPED, "reason" => reason).increment(1);
}

/// Publish an alert target's counters at zero (at delivery start).
pub fn alert_target_init(target: &str) {
    for outcome in ["sent", "failed", "dropped"] {
        counter!(ALERT_DELIVERIES, "target" => target.to_owned(), "outcome" => outcome).increment(0);
    }
    counter!(ALERT_RETRIES, "target" => target.to_owned()).increment(0);
}

/// `n` alert events reached an outcome at a target: "sent", "failed" or "dropped".
pub fn alert_deliveries(target: &str, outcome: &'static str, n: u64) {
    counter!(ALERT_DELIVERIES, "target" => target.to_owned(), "outcome" => outcome).increment(n);
}

/// One more delivery attempt of a batch to a target.
pub fn alert_delivery_retry(target: &str) {
    counter!(ALERT_RETRIES, "target" => target.to_owned()).increment(1);
}

/// Time of one batch.
pub fn record_batch_seconds(secs: f64) {
    histogram!(BATCH_SECONDS).record(secs);
}

/// One group commit of `batches` batches that took `secs`.
pub fn record_group_commit(batches: usize, secs: f64) {
    histogram!(COMMIT_SECONDS).record(secs);
    histogram!(COMMIT_BATCHES).record(batches as f64);
}

/// Bound addresses, for the startup log and for tests that parse it.
pub fn log_listening(grpc: SocketAddr, metrics: SocketAddr) {
    tracing::info!(grpc = %grpc, metrics = %metrics, "listening");
}

/// Log format.
#[derive(Debug, Clone, Copy, PartialEq, Eq, clap::ValueEnum)]
pub enum LogFormat {
    /// Human-readable lines.
    Human,
    /// One JSON object per line.
    Json,
}

/// Set up tracing on stderr (level from `RUST_LOG`, default info).
pub fn init_logs(format: LogFormat) {
    use tracing_subscriber::EnvFilter;
    let filter = EnvFilter::try_from_default_env().unwrap_or_else(|_| EnvFilter::new("info"));
    let b = tracing_subscriber::fmt().with_env_filter(filter).with_writer(std::io::stderr);
    let _ = match format {
        LogFormat::Human => b.with_ansi(false).try_init(),
        LogFormat::Json => b.json().try_init(),
    };
}

#[cfg(test)]
mod tests {
    #[test]
    fn every_metric_name_is_listed() {
        // Each `const NAME: &str = "mtgauge_..."` of this file is in METRIC_NAMES (the list
        // `serve --show-config` prints and the deploy tests check dashboards and rules against).
        let src = include_str!("mod.rs");
        let declared: Vec<&str> = src
            .lines()
            .filter_map(|l| l.strip_prefix("const ").and_then(|l| l.split_once(": &str = \"mtgauge_")).map(|(_, rest)| rest.trim_end_matches("\";")))
            .collect();
        assert_eq!(declared.len(), super::METRIC_NAMES.len(), "{declared:?}");
        for d in declared {
            assert!(super::METRIC_NAMES.contains(&format!("mtgauge_{d}").as_str()), "mtgauge_{d} is not in METRIC_NAMES");
        }
    }
}
