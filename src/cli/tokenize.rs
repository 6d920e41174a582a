//! `mtgauge tokenize`: show what a tokenizer makes of each line.

use std::io::Write;

use clap::Args;

use super::input::{display_name, read_bytes};
use super::CliError;
use crate::refs::split_lines;
use crate::text::{TokenBuf, Tokenizer, DEFAULT_TOKENIZER};

/// Arguments of `mtgauge tokenize`.
#[derive(Debug, Args)]
pub struct TokenizeArgs {
    /// Tokenizer: whitespace, nist, nist-unicode, cjk, characters.
    #[arg(long, default_value_t = DEFAULT_TOKENIZER, value_name = "NAME")]
    pub tokenizer: Tokenizer,
    /// Through the Unicode lowercase mapping before tokenizing.
    #[arg(long)]
    pub caseless: bool,
    /// Input file (default: standard input). Output: one line per input line, tokens separated by
    /// one space.
    #[arg(value_name = "FILE", default_value = "-")]
    pub file: String,
}

pub(super) fn run(a: TokenizeArgs) -> Result<(), CliError> {
    let bytes = read_bytes(&a.file)?;
    let lines = split_lines(display_name(&a.file), &bytes)?;
    let mut out = String::with_capacity(bytes.len() * 2);
    let mut buf = TokenBuf::default();
    for line in lines {
        a.tokenizer.tokenize_into(line, a.caseless, &mut buf);
        for (i, t) in buf.tokens().enumerate() {
            if i > 0 {
                out.push(' ');
            }
            out.push_str(t);
        }
        out.push('\n');
    }
    let mut stdout = std::io::stdout().lock();
    stdout
        .write_all(out.as_bytes())
        .and_then(|_| stdout.flush())
        .map_err(|e| CliError::Output { what: "standard output".into(), source: e })
}
