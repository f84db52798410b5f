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

/// Checksummed framing of Holdfast's binary files (dataset shards, model files, training
/// checkpoints): an 8-byte magic, the body's length as a little-endian `u64`, the body, then
/// FNV-1a 64 of everything before it, little-endian.
pub fn seal(magic: &[u8; 8], body: &[u8]) -> Vec<u8> {
    let mut out = Vec::with_capacity(body.len() + 24);
    out.extend_from_slice(magic);
    out.extend_from_slice(&(body.len() as u64).to_le_bytes());
    out.extend_from_slice(body);
    let sum = fnv1a64(&out);
    out.extend_from_slice(&sum.to_le_bytes());
    out
}

/// The body of bytes written by [`seal`] with this magic, or what is wrong with them (for the
/// caller to put in its error, with the file's name).
pub fn unseal<'a>(magic: &[u8; 8], bytes: &'a [u8]) -> Result<&'a [u8], String> {
    if bytes.len() < 24 || &bytes[..8] != magic {
        return Err(format!(
            "not a file of this kind (expected it to start with {:?}; {} bytes)",
            String::from_utf8_lossy(magic),
            bytes.len()
        ));
    }
    let mut len = [0u8; 8];
    len.copy_from_slice(&bytes[8..16]);
    let announced = u64::from_le_bytes(len).saturating_add(24);
    if bytes.len() as u64 != announced {
        return Err(format!(
            "truncated or padded: {} bytes, the header announces {announced}",
            bytes.len()
        ));
    }
    let (content, tail) = bytes.split_at(bytes.len() - 8);
    let mut sum = [0u8; 8];
    sum.copy_from_slice(tail);
    if fnv1a64(content) != u64::from_le_bytes(sum) {
        return Err("checksum mismatch: the file is corrupted".to_string());
    }
    Ok(&content[16..])
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

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn fnv_matches_its_published_test_vectors() {
        // FNV-1a 64 reference values (draft-eastlake-fnv, test vectors: "" and "a").
        assert_eq!(fnv1a64(b""), 0xcbf2_9ce4_8422_2325);
        assert_eq!(fnv1a64(b"a"), 0xaf63_dc4c_8601_ec8c);
    }

    #[test]
    fn sealed_bytes_open_only_intact() {
        let sealed = seal(b"TESTMAG1", b"payload");
        assert_eq!(sealed.len(), 7 + 24);
        assert_eq!(unseal(b"TESTMAG1", &sealed).unwrap(), b"payload");
        assert!(
            unseal(b"OTHERMAG", &sealed)
                .unwrap_err()
                .starts_with("not a file of this kind")
        );
        assert!(
            unseal(b"TESTMAG1", &sealed[..30])
                .unwrap_err()
                .starts_with("truncated")
        );
        for k in 0..sealed.len() {
            let mut b = sealed.clone();
            b[k] ^= 0x01;
            assert!(unseal(b"TESTMAG1", &b).is_err(), "byte {k}");
        }
    }
}
