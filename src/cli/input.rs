//! Reading input files for the offline commands.

use std::io::Read;

use crate::refs::{self, InputError, RefSet};

/// Name used for standard input in messages.
pub const STDIN_NAME: &str = "<stdin>";

/// Read a whole file (`-` is standard input).
pub fn read_bytes(path: &str) -> Result<Vec<u8>, InputError> {
    if path == "-" {
        let mut buf = Vec::new();
        std::io::stdin().read_to_end(&mut buf).map_err(|e| InputError::file(STDIN_NAME, format!("cannot read: {e}")))?;
        return Ok(buf);
    }
    std::fs::read(path).map_err(|e| InputError::file(path, format!("cannot read: {e}")))
}

/// Display name of an input path.
pub fn display_name(path: &str) -> &str {
    if path == "-" {
        STDIN_NAME
    } else {
        path
    }
}

/// How `--ref` files are read.
#[derive(Debug, Clone, Copy, PartialEq, Eq, clap::ValueEnum)]
pub enum RefFormat {
    /// JSONL when there is one file named *.jsonl or *.ndjson, else plain.
    Auto,
    /// Line-aligned plain text, one file per reference stream.
    Plain,
    /// One JSONL file of {"id", "source", "refs"} objects.
    Jsonl,
}

/// The format `--ref-format` and the `--ref` paths name.
pub fn resolve_format(paths: &[String], format: RefFormat) -> refs::RefFormat {
    match format {
        RefFormat::Jsonl => refs::RefFormat::Jsonl,
        RefFormat::Plain => refs::RefFormat::Plain,
        RefFormat::Auto => refs::RefFormat::detect(paths),
    }
}

/// Read every file of `paths`, in order (the first that cannot be read is the error).
pub fn read_all(paths: &[String]) -> Result<Vec<Vec<u8>>, InputError> {
    paths.iter().map(|p| read_bytes(p)).collect()
}

/// Load a reference set from `--ref` files already read (`bytes`, one per path), with an optional
/// aligned source file for plain text.
pub fn parse_refset(paths: &[String], format: RefFormat, bytes: &[Vec<u8>], source: Option<&str>) -> Result<RefSet, InputError> {
    let format = resolve_format(paths, format);
    let files: Vec<(&str, &[u8])> = paths.iter().map(|p| display_name(p)).zip(bytes.iter().map(Vec::as_slice)).collect();
    let src = source.map(read_bytes).transpose()?;
    refs::load(format, &files, source.zip(src.as_deref())).map_err(|e| match e {
        refs::LoadError::Input(e) => e,
        refs::LoadError::JsonlFiles(_) => InputError::file(paths.get(1).map_or("", String::as_str), "a JSONL reference set is one file; give --ref once"),
        refs::LoadError::JsonlSource => InputError::file(source.unwrap_or(""), "a JSONL reference set carries its sources; drop the source file"),
        refs::LoadError::NoReferences => InputError::file("--ref", "no reference file given"),
        refs::LoadError::Set { file, message } => InputError::file(&file, message),
    })
}
