//! The `mtgauge` binary: parse the command line, hand it to the library.
use clap::Parser;

fn main() -> std::process::ExitCode {
    let cli = mtgauge::cli::Cli::parse();
    // Output piped into a reader that stops early (`mtgauge status | head`) ends a command
    // quietly, as other command-line tools do, instead of a panic on the failed write: restore
    // the default action of SIGPIPE, which the Rust runtime sets to ignore. Not for the daemon,
    // which must outlive a log reader that goes away.
    #[cfg(unix)]
    if !matches!(cli.command, mtgauge::cli::Command::Serve(_)) {
        // SAFETY: called before any other thread exists; SIG_DFL is a valid action.
        unsafe {
            libc::signal(libc::SIGPIPE, libc::SIG_DFL);
        }
    }
    mtgauge::cli::run(cli)
}
