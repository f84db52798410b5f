//! Holdfast's grid file: TOML, engineering units in field names, versioned.
//!
//! The format is documented for users, with a complete annotated example, in
//! `scenarios/README.md`. The record types here are the file's schema (a boundary): they convert
//! into the validated [`Grid`] and never appear in the in-memory model.
//!
//! Loading reports every problem it finds at once, each with file, line, record, field and value.

mod v1;

use std::path::Path;

use crate::{Error, Grid};

/// The grid-file format versions this build reads.
pub const SUPPORTED_VERSIONS: &[i64] = &[1];

/// The version [`write_grid`] writes.
pub const CURRENT_VERSION: i64 = 1;

/// Reads and validates a grid file.
pub fn load_grid(path: &Path) -> Result<Grid, Error> {
    let text = std::fs::read_to_string(path).map_err(|source| Error::Io {
        path: path.to_path_buf(),
        source,
    })?;
    parse_grid(&text, path)
}

/// Parses and validates grid-file text; `path` is used only in messages.
pub fn parse_grid(text: &str, path: &Path) -> Result<Grid, Error> {
    let version = peek_version(text, path)?;
    if !SUPPORTED_VERSIONS.contains(&version) {
        return Err(Error::UnsupportedVersion {
            path: path.to_path_buf(),
            found: version,
            supported: SUPPORTED_VERSIONS.to_vec(),
        });
    }
    v1::parse(text, path)
}

/// Serialises a grid as a version-[`CURRENT_VERSION`] grid file, impedances in per unit on the
/// system base. Loading the text again gives the same grid.
pub fn write_grid(grid: &Grid) -> Result<String, Error> {
    v1::write(grid)
}

fn peek_version(text: &str, path: &Path) -> Result<i64, Error> {
    #[derive(serde::Deserialize)]
    struct Head {
        format_version: Option<toml::Spanned<i64>>,
    }
    let head: Head = toml::from_str(text).map_err(|e| syntax_error(text, path, &e))?;
    match head.format_version {
        Some(v) => Ok(*v.get_ref()),
        None => Err(Error::Invalid {
            path: path.to_path_buf(),
            problems: vec![crate::Problem::new(
                Some(1),
                "file header",
                "missing `format_version` (this build reads format_version = 1)",
            )],
        }),
    }
}

/// FNV-1a, 64 bits: a stable fingerprint of bytes (not a defence against tampering).
pub fn fnv1a64(bytes: &[u8]) -> u64 {
    let mut h: u64 = 0xcbf2_9ce4_8422_2325;
    for &b in bytes {
        h ^= u64::from(b);
        h = h.wrapping_mul(0x0100_0000_01b3);
    }
    h
}

/// The grid's fingerprint: FNV-1a 64 of its canonical grid file, so a re-formatted but equal
/// grid file keeps it. Datasets and model files carry it to tell which grid they belong to.
pub fn grid_fingerprint(grid: &Grid) -> Result<u64, Error> {
    Ok(fnv1a64(write_grid(grid)?.as_bytes()))
}

/// A TOML parse error of `text` (read from `path`) as an [`Error::Syntax`] with line and column;
/// shared by every TOML file of ours (grids, scenarios, studies).
pub fn syntax_error(text: &str, path: &Path, e: &toml::de::Error) -> Error {
    let (line, column) = match e.span() {
        Some(span) => line_col(text, span.start),
        None => (1, 1),
    };
    Error::Syntax {
        path: path.to_path_buf(),
        line,
        column,
        message: e.message().trim().to_string(),
    }
}

/// 1-based line and column of a byte offset.
pub fn line_col(text: &str, offset: usize) -> (usize, usize) {
    let offset = offset.min(text.len());
    let before = text.get(..offset).unwrap_or(text);
    let line = before.bytes().filter(|&b| b == b'\n').count() + 1;
    let column = before.rsplit('\n').next().map_or(0, |s| s.chars().count()) + 1;
    (line, column)
}
