//! Command-line interface: one file per subcommand. `main.rs` parses [`Cli`] and calls [`run`].
//!
//! Errors end the process with exit code 2 and one line on stderr; nothing is printed on stdout
//! for a failed command.

mod alert_bench;
mod bench;
mod bench_external;
mod bench_guards;
mod compare;
pub mod demo;
mod input;
mod load;
mod progress;
mod report;
mod rules;
mod score;
mod send;
mod send_items;
mod serve;
mod status;
mod token;
mod tokenize;
mod watch;

use std::io::IsTerminal;
use std::process::ExitCode;

use clap::{Args, Parser, Subcommand};

use crate::metric::{
    BleuParams, ChrfParams, Metric, MetricSpec, ScoreConfig, Smoothing, DEFAULT_METRICS, MAX_BLEU_ORDER, MAX_CHRF_CHAR_ORDER,
    MAX_CHRF_WORD_ORDER,
};
use crate::refs::InputError;
use crate::text::{Tokenizer, DEFAULT_TOKENIZER};

/// Exit code of a failed command.
pub const EXIT_FAILURE: u8 = 2;

const ABOUT: &str = "Live machine-translation quality monitoring: corpus BLEU and chrF from streams of hypotheses.";
const LONG_ABOUT: &str = "\
mtgauge scores machine-translation hypotheses against human reference translations with BLEU \
(Papineni et al. 2002) and chrF / chrF++ (Popović 2015, 2017), from integer statistics that add \
up exactly across segments, streams and replicas.

Automatic metrics are a proxy for translation quality: a drop is a reason to look, not a verdict. \
Scores are comparable only under the same tokenizer, references and configuration, which every \
output records.";

/// The `mtgauge` command line.
#[derive(Debug, Parser)]
#[command(name = "mtgauge", version, about = ABOUT, long_about = LONG_ABOUT)]
pub struct Cli {
    /// What to do.
    #[command(subcommand)]
    pub command: Command,
}

/// Subcommands.
#[derive(Debug, Subcommand)]
pub enum Command {
    /// Score a hypothesis file against reference files, offline.
    #[command(long_about = score::long_about())]
    Score(score::ScoreArgs),
    /// Compare two systems' hypothesis files on the same references, offline: the difference of
    /// their scores, its paired-bootstrap interval and an approximate-randomization p-value.
    #[command(long_about = compare::LONG_ABOUT)]
    Compare(compare::CompareArgs),
    /// Print the tokens a tokenizer makes of each input line (one output line per input line).
    Tokenize(tokenize::TokenizeArgs),
    /// Show mtgauge live on built-in demo data (an invented ferry operator's passenger notices).
    Demo(demo::DemoArgs),
    /// Run the monitoring daemon (gRPC scoring service and Prometheus metrics).
    #[command(long_about = serve::long_about())]
    Serve(serve::ServeArgs),
    /// Stream a hypothesis file into a session of a running server.
    #[command(long_about = send::LONG_ABOUT)]
    Send(send::SendArgs),
    /// Show the scores of a running server's sessions.
    #[command(long_about = status::long_about())]
    Status(status::StatusArgs),
    /// Make a bearer token and the line for the server's tokens file.
    #[command(long_about = token::LONG_ABOUT)]
    Token(token::TokenArgs),
    /// Render the alert rules of a serve config file as Prometheus recording and alerting rules.
    #[command(long_about = rules::LONG_ABOUT)]
    Rules(rules::RulesArgs),
    /// Write a session's score over time (from the daemon's history) as an SVG chart.
    #[command(long_about = report::LONG_ABOUT)]
    Report(report::ReportArgs),
    /// Drive a running server with synthetic load and print throughput and latency.
    Load(load::LoadArgs),
    /// Measure scoring speed on a generated corpus and print ratios against a baseline measured in the same run.
    #[command(long_about = bench::LONG_ABOUT)]
    Bench(bench::BenchArgs),
    /// Measure the alert rules' false alarms and detection delays on generated data, through the
    /// daemon's own scoring and alert evaluation, beside a fixed-window test.
    #[command(long_about = alert_bench::LONG_ABOUT)]
    AlertBench(alert_bench::AlertBenchArgs),
}

/// `--metric` in `--help`: the syntax, every key with its default (from the constants).
fn metric_help() -> String {
    let b = BleuParams::default();
    let (c, cpp) = (ChrfParams::default_for(Metric::Chrf), ChrfParams::default_for(Metric::ChrfPlusPlus));
    let smoothing: Vec<&str> = Smoothing::ALL.iter().map(|m| m.name()).collect();
    format!(
        "A metric to compute, repeatable: NAME or NAME:key=value,... (default: {defaults}).\n\
         bleu: order=N (1-{MAX_BLEU_ORDER}, default {}), ref-length=closest|shortest (default {}; closest ties \
         to the shorter), smoothing={} (sentence-level scores only; default {}), epsilon=X (of the epsilon \
         smoothing, default {}).\n\
         chrf, chrf++: chars=N (character orders 1-{MAX_CHRF_CHAR_ORDER}, default {}), words=N (word orders \
         0-{MAX_CHRF_WORD_ORDER}, default {} for chrf and {} for chrf++), beta=B (recall weighs B times \
         precision, default {}).\n\
         Example: --metric bleu:order=4 --metric chrf++:beta=2",
        b.order,
        b.ref_length,
        smoothing.join("|"),
        b.smoothing,
        b.epsilon,
        c.chars,
        c.words,
        cpp.words,
        c.beta,
        defaults = DEFAULT_METRICS.map(Metric::name).join(" and "),
    )
}

/// Options that define how scores are computed; shared by every command that scores.
#[derive(Debug, Clone, Args)]
pub struct ScoringArgs {
    /// A metric to compute, repeatable: NAME or NAME:key=value,... (bleu, chrf, chrf++).
    #[arg(long = "metric", value_name = "SPEC", long_help = metric_help())]
    pub metrics: Vec<String>,
    /// Tokenizer for BLEU: whitespace, nist (the NIST mteval western rules), nist-unicode (the NIST
    /// international rules over Unicode classes), cjk (CJK ideographs and kana one token each,
    /// else nist), characters (every non-space character).
    #[arg(long, default_value_t = DEFAULT_TOKENIZER, value_name = "NAME")]
    pub tokenizer: Tokenizer,
    /// Compare without case: hypotheses and references through the Unicode lowercase mapping
    /// before scoring (all metrics).
    #[arg(long)]
    pub caseless: bool,
}

impl ScoringArgs {
    /// The validated configuration.
    pub fn config(&self) -> Result<ScoreConfig, CliError> {
        metric_config(self.tokenizer, self.caseless, &self.metrics)
    }
}

/// The configuration of `--metric` specs (read here rather than by clap, so that a bad spec is
/// one line on stderr like every other error).
pub fn metric_config(tokenizer: Tokenizer, caseless: bool, specs: &[String]) -> Result<ScoreConfig, CliError> {
    let usage = |e: crate::metric::ConfigError| CliError::Usage(e.to_string());
    let specs = specs.iter().map(|s| s.parse::<MetricSpec>()).collect::<Result<Vec<_>, _>>().map_err(usage)?;
    ScoreConfig::new(tokenizer, caseless, specs).map_err(usage)
}

/// Everything that can make a command fail.
#[derive(Debug, thiserror::Error)]
pub enum CliError {
    /// A bad input file (names the file and line).
    #[error("{0}")]
    Input(#[from] InputError),
    /// An invalid option value or combination.
    #[error("{0}")]
    Usage(String),
    /// A call to a running server failed, or its connection settings are bad.
    #[error(transparent)]
    Client(#[from] crate::client::ClientError),
    /// The server stopped with an error.
    #[error(transparent)]
    Server(#[from] crate::server::RunError),
    /// Writing output failed.
    #[error("cannot write {what}: {source}")]
    Output {
        /// What was being written.
        what: String,
        /// The I/O error.
        source: std::io::Error,
    },
}

/// Run a parsed command line; the exit code to return.
pub fn run(cli: Cli) -> ExitCode {
    let result = match cli.command {
        Command::Score(a) => score::run(a),
        Command::Compare(a) => compare::run(a),
        Command::Tokenize(a) => tokenize::run(a),
        Command::Demo(a) => demo::run(a),
        Command::Bench(a) => bench::run(a),
        Command::AlertBench(a) => alert_bench::run(a),
        Command::Serve(a) => serve::run(a),
        Command::Load(a) => load::run(a),
        Command::Rules(a) => rules::run(a),
        Command::Report(a) => report::run(a),
        Command::Token(a) => token::run(a),
        Command::Send(a) => send::run(a),
        Command::Status(a) => status::run(a),
    };
    match result {
        Ok(()) => ExitCode::SUCCESS,
        Err(e) => {
            eprintln!("mtgauge: error: {e}");
            match &e {
                CliError::Server(s) => ExitCode::from(s.exit_code(EXIT_FAILURE)),
                _ => ExitCode::from(EXIT_FAILURE),
            }
        }
    }
}

/// Whether progress should be drawn on stderr.
fn stderr_is_terminal() -> bool {
    std::io::stderr().is_terminal()
}

/// Number of scoring threads to use by default.
pub fn default_threads() -> usize {
    std::thread::available_parallelism().map_or(1, |n| n.get())
}
