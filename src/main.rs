//! The `mtgauge` binary: parse the command line, hand it to the library.
use clap::Parser;

fn main() -> std::process::ExitCode {
    mtgauge::cli::run(mtgauge::cli::Cli::parse())
}
