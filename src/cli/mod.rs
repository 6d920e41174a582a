//! Command-line interface: one file per subcommand. `main.rs` parses [`Cli`] and calls [`run`].
//!
//! Errors end the process with exit code 2 and one line on stderr; nothing is printed on stdout
//! for a failed command.

mod bench;
mod demo;
mod demo_live;
mod input;
mod load;
mod score;
mod send;
mod serve;
mod status;
mod token;
mod tokenize;

use std::io::IsTerminal;
use std::process::ExitCode;

use clap::{Args, Parser, Subcommand};

use crate::metric::{
    MetricSet, RefLength, ScoreConfig, Smoothing, DEFAULT_BLEU_ORDER, DEFAULT_CHRF_BETA, DEFAULT_CHRF_CHAR_ORDER,
    DEFAULT_CHRF_WORD_ORDER, DEFAULT_EPSILON,
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
    #[command(long_about = score::LONG_ABOUT)]
    Score(score::ScoreArgs),
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
    Status(status::StatusArgs),
    /// Make a bearer token and the line for the server's tokens file.
    #[command(long_about = token::LONG_ABOUT)]
    Token(token::TokenArgs),
    /// Drive a running server with synthetic load and print throughput and latency.
    Load(load::LoadArgs),
    /// Measure scoring speed on a generated corpus and print ratios against a baseline measured in the same run.
    Bench(bench::BenchArgs),
}

/// Options that define how scores are computed; shared by every command that scores.
#[derive(Debug, Clone, Args)]
pub struct ScoringArgs {
    /// Metrics to compute, comma-separated: bleu, chrf, chrf++.
    #[arg(long, default_value = "bleu,chrf", value_name = "LIST")]
    pub metrics: MetricSet,
    /// Tokenizer for BLEU: whitespace, nist (the NIST mteval western rules), nist-unicode (the NIST
    /// international rules over Unicode classes), cjk (CJK characters one token each, else nist),
    /// characters (every non-space character).
    #[arg(long = "tokenize", default_value_t = DEFAULT_TOKENIZER, value_name = "NAME")]
    pub tokenizer: Tokenizer,
    /// Lowercase hypotheses and references before scoring (Unicode-aware; all metrics).
    #[arg(long)]
    pub lowercase: bool,
    /// BLEU maximum n-gram order (1-8).
    #[arg(long, default_value_t = DEFAULT_BLEU_ORDER, value_name = "N")]
    pub bleu_order: usize,
    /// BLEU effective reference length: closest (to the hypothesis length, ties to the shorter) or
    /// shortest.
    #[arg(long, default_value = "closest", value_name = "RULE")]
    pub ref_length: RefLength,
    /// Smoothing of sentence-level BLEU (corpus BLEU is never smoothed): none, epsilon, plus-one,
    /// nist-halving.
    #[arg(long, default_value = "epsilon", value_name = "METHOD")]
    pub smoothing: Smoothing,
    /// The epsilon of `--smoothing epsilon`.
    #[arg(long, default_value_t = DEFAULT_EPSILON, value_name = "X")]
    pub epsilon: f64,
    /// chrF character n-gram order (1-10).
    #[arg(long, default_value_t = DEFAULT_CHRF_CHAR_ORDER, value_name = "N")]
    pub chrf_char_order: usize,
    /// chrF++ word n-gram order (1-4).
    #[arg(long, default_value_t = DEFAULT_CHRF_WORD_ORDER, value_name = "N")]
    pub chrf_word_order: usize,
    /// chrF beta: weight of recall against precision.
    #[arg(long = "chrf-beta", default_value_t = DEFAULT_CHRF_BETA, value_name = "B")]
    pub beta: f64,
}

impl ScoringArgs {
    /// The validated configuration.
    pub fn config(&self) -> Result<ScoreConfig, CliError> {
        let c = ScoreConfig {
            metrics: self.metrics,
            tokenizer: self.tokenizer,
            lowercase: self.lowercase,
            bleu_order: self.bleu_order,
            ref_length: self.ref_length,
            smoothing: self.smoothing,
            epsilon: self.epsilon,
            chrf_char_order: self.chrf_char_order,
            chrf_word_order: self.chrf_word_order,
            beta: self.beta,
        };
        c.validate().map_err(|e| CliError::Usage(e.to_string()))?;
        Ok(c)
    }
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
        Command::Tokenize(a) => tokenize::run(a),
        Command::Demo(a) => demo::run(a),
        Command::Bench(a) => bench::run(a),
        Command::Serve(a) => serve::run(a),
        Command::Load(a) => load::run(a),
        Command::Token(a) => token::run(a),
        Command::Send(a) => send::run(a),
        Command::Status(a) => status::run(a),
    };
    match result {
        Ok(()) => ExitCode::SUCCESS,
        Err(e) => {
            eprintln!("mtgauge: error: {e}");
            ExitCode::from(EXIT_FAILURE)
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
