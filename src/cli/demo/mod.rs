//! `mtgauge demo`: the built-in scenario of an invented ferry operator's passenger notices
//! (English to German). By default a live run: the daemon in-process on free loopback ports,
//! simulated producers streaming into two sessions, one of which degrades half-way. With
//! `--offline`, the three simulated systems scored offline.

use std::path::PathBuf;
use std::sync::Arc;

use clap::Args;

use super::score::score_corpus_lines;
use super::{default_threads, CliError};
pub(crate) mod corpus;
mod live;
mod phrases;
pub mod scenario;

use scenario::{demo_segments, demo_systems, write_demo_files};
use crate::metric::ScoreConfig;
use crate::refs::RefSet;
use crate::report::{stats_lines, PROXY_NOTE};

/// Length of the live demo unless told.
pub const DEFAULT_DEMO_SECONDS: u64 = 30;

/// Arguments of `mtgauge demo`.
#[derive(Debug, Args)]
pub struct DemoArgs {
    /// Seconds the live demo runs.
    #[arg(long, default_value_t = DEFAULT_DEMO_SECONDS, value_name = "S")]
    pub seconds: u64,
    /// After the live run, keep the daemon and its status page serving (until Ctrl-C or
    /// SIGTERM), to look around: the page's URL is printed at the start.
    #[arg(long, conflicts_with = "offline")]
    pub linger: bool,
    /// Score the three simulated systems offline instead of the live run.
    #[arg(long)]
    pub offline: bool,
    /// Also write the demo data as files into DIR (plain references, JSONL, hypotheses), to try
    /// `mtgauge score` on.
    #[arg(long, value_name = "DIR")]
    pub write_files: Option<PathBuf>,
}

pub(super) fn run(a: DemoArgs) -> Result<(), CliError> {
    if !a.offline {
        if a.write_files.is_some() {
            return Err(CliError::Usage("--write-files goes with --offline".into()));
        }
        return live::run(a.seconds, a.linger);
    }
    let segments = demo_segments();
    let set = Arc::new(
        RefSet::new(segments)
            .map_err(|e| CliError::Usage(format!("built-in demo data is invalid: {e}")))?,
    );
    let config: ScoreConfig = "bleu chrf chrf++".parse().map_err(|e| CliError::Usage(format!("{e}")))?;
    println!(
        "mtgauge demo: Nordhavn Ferries passenger notices, English -> German, {} segments, 2 references each (references {})",
        set.len(),
        &set.digest_hex()[..16]
    );
    for system in demo_systems() {
        let hyps: Vec<&str> = system.hypotheses.iter().map(String::as_str).collect();
        let corpus = score_corpus_lines(Arc::clone(&set), config, &hyps, default_threads(), false);
        println!("\n{} ({})", system.name, system.description);
        for line in stats_lines(&corpus, &config, "  ") {
            println!("{line}");
        }
    }
    println!("\n  config  {}", config.describe());
    println!("{PROXY_NOTE}");
    if let Some(dir) = &a.write_files {
        let files = write_demo_files(dir).map_err(|e| CliError::Output { what: dir.display().to_string(), source: e })?;
        println!("\nwrote {} files to {}; try:", files.len(), dir.display());
        let d = dir.display();
        println!("  mtgauge score --ref {d}/ref1.de.txt --ref {d}/ref2.de.txt --hyp {d}/hyp.model-v7.de.txt");
        println!("  mtgauge score --ref {d}/refs.jsonl --hyp {d}/hyp.model-v7.de.txt --metric bleu --metric chrf++ --json");
    }
    Ok(())
}
