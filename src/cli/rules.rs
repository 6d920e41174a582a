//! `mtgauge rules`: the `[[alert]]` rules of a `serve` config file rendered as Prometheus
//! recording and alerting rules ([`crate::alerts::promql`]).

use std::io::Write;
use std::path::PathBuf;

use clap::Args;

use super::serve::{parse_file, resolve, ServeArgs};
use super::CliError;

pub(super) const LONG_ABOUT: &str = "\
Render the [[alert]] rules of a `serve --config` file as a Prometheus rule file, so that the \
rules the daemon evaluates itself are also judged by Prometheus over the whole fleet: the \
counters of every replica summed, and the bootstrap replicates they export \
(`serve --exported-resamples`, default 100) for the intervals.

Rendered: rules with `when = \"below\"` or `when = \"drop\"` over `window = \"all\"` (what the \
replicas' counters hold) or a time window such as \"15m\" (increase() over it), and rules with \
`when = \"flag-rate\"` (the guard counters summed over the replicas). Not rendered, \
and named in the file's header and on stderr: `window = \"recent\"` (the session's last \
segments by count, which Prometheus cannot select) and `when = \"decline\"` (a sequential test \
over the stream of chunks). Those run in the daemon only.

Each alert fires when the upper bound of the 95% interval is below the rule's limit \
(threshold, or -points for a drop against the baseline session) with at least min_segments \
scored segments in the window, for for_seconds; once firing it resolves when the bound is back \
above the limit by clear_margin. Alerts carry the daemon's labels (alertname, session, \
severity, metric and extra_labels), so the same alert from the daemon and from Prometheus is \
one alert at Alertmanager. A flag-rate alert fires when the lower bound of the 95% Wilson \
interval of the guard's flagged share (of the items it decided on: checked minus undecided) is \
above the threshold, with at least min_segments decided items, and resolves once the bound is \
clear_margin below it. Check the output with `promtool check rules`.

The whole config file is checked as `serve` checks it; an error names the key.";

/// `rules` options.
#[derive(Debug, Args)]
pub struct RulesArgs {
    /// The TOML config file given to `mtgauge serve --config` (its [[alert]] entries).
    #[arg(long, value_name = "FILE")]
    pub config: PathBuf,
    /// Write the rule file here instead of standard output.
    #[arg(long, value_name = "FILE")]
    pub output: Option<PathBuf>,
}

pub(super) fn run(a: RulesArgs) -> Result<(), CliError> {
    let name = a.config.display().to_string();
    let text = std::fs::read_to_string(&a.config).map_err(|e| CliError::Usage(format!("{name}: {e}")))?;
    let resolved = resolve(&ServeArgs::default(), parse_file(&name, &text)?)?;
    let rules = resolved.server.alert_rules;
    if rules.is_empty() {
        return Err(CliError::Usage(format!("{name}: no [[alert]] rules to render")));
    }
    let source = a.config.file_name().map_or(name.clone(), |f| f.to_string_lossy().into_owned());
    let r = crate::alerts::promql::render(&rules, &source);
    for (rule, why) in &r.skipped {
        eprintln!("mtgauge rules: not rendered (daemon only): {rule}: {why}");
    }
    match &a.output {
        Some(p) => std::fs::write(p, &r.yaml).map_err(|e| CliError::Usage(format!("{}: {e}", p.display())))?,
        None => {
            let mut out = std::io::stdout().lock();
            out.write_all(r.yaml.as_bytes()).and_then(|()| out.flush()).map_err(|e| CliError::Usage(format!("standard output: {e}")))?;
        }
    }
    eprintln!("mtgauge rules: {} of {} rules rendered{}", r.rendered.len(), rules.len(), a.output.as_ref().map(|p| format!(" to {}", p.display())).unwrap_or_default());
    Ok(())
}
