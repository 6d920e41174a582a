//! `mtgauge token`: make a new bearer token and the line for the server's tokens file.

use std::io::Read;

use clap::Args;

use super::CliError;
use crate::server::auth::token_line_hash;

pub const LONG_ABOUT: &str = "\
Make a new random bearer token. The token is printed once, on stdout; give it to the client \
(clients read it from MTGAUGE_TOKEN). The line to add to the server's --tokens file is printed \
on stderr: it holds only the token's SHA-256 hash, its scopes and a name.

Scopes: submit (send hypotheses), read (scores and definitions), admin (create, reset and close \
sessions, load and delete reference sets; implies the others). Missing or unknown tokens get \
UNAUTHENTICATED; a known token without the scope a call needs gets PERMISSION_DENIED.";

/// `token` options.
#[derive(Debug, Args)]
pub struct TokenArgs {
    /// Scopes, comma-separated: submit, read, admin.
    #[arg(long, value_name = "LIST")]
    pub scopes: String,
    /// Name recorded with the hash (shown in errors and logs instead of the token).
    #[arg(long, value_name = "NAME", default_value = "unnamed")]
    pub name: String,
}

/// Bytes of randomness in a token.
const TOKEN_BYTES: usize = 32;

pub(super) fn run(a: TokenArgs) -> Result<(), CliError> {
    for s in a.scopes.split(',') {
        if !matches!(s, "submit" | "read" | "admin") {
            return Err(CliError::Usage(format!("unknown scope '{s}' (submit, read, admin)")));
        }
    }
    if a.name.is_empty() || a.name.contains(char::is_whitespace) {
        return Err(CliError::Usage("--name must be one word".into()));
    }
    let mut raw = [0u8; TOKEN_BYTES];
    std::fs::File::open("/dev/urandom").and_then(|mut f| f.read_exact(&mut raw)).map_err(|e| CliError::Usage(format!("cannot read /dev/urandom: {e}")))?;
    let token = format!("mtg_{}", crate::refs::hex(&raw));
    println!("{token}");
    eprintln!("{} {} {}", token_line_hash(&token), a.scopes, a.name);
    Ok(())
}
