//! Helpers shared by the dataset tests.

#![allow(dead_code, clippy::unwrap_used, clippy::expect_used)] // reason: test helpers

use std::path::{Path, PathBuf};

/// The repository root.
pub(crate) fn root() -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR")).join("..")
}

/// A fresh, empty folder under the system temp dir, unique to this test and process.
pub(crate) fn fresh_dir(name: &str) -> PathBuf {
    let dir = std::env::temp_dir().join(format!("holdfast-{name}-{}", std::process::id()));
    let _ = std::fs::remove_dir_all(&dir);
    std::fs::create_dir_all(&dir).unwrap();
    dir
}

/// The demo study with a given shard size, written into `dir` (grid path made absolute).
pub(crate) fn demo_study(dir: &Path, shard_size: usize) -> PathBuf {
    let text = std::fs::read_to_string(root().join("scenarios/quillmoor-study.toml")).unwrap();
    let grid = root().join("scenarios/quillmoor.toml");
    let text = text
        .replace(
            "grid = \"quillmoor.toml\"",
            &format!("grid = {:?}", grid.display().to_string()),
        )
        .replace("shard_size = 250", &format!("shard_size = {shard_size}"));
    let path = dir.join("study.toml");
    std::fs::write(&path, text).unwrap();
    path
}

/// Every file of a folder, name and bytes, sorted by name.
pub(crate) fn folder_bytes(dir: &Path) -> Vec<(String, Vec<u8>)> {
    let mut out: Vec<(String, Vec<u8>)> = std::fs::read_dir(dir)
        .unwrap()
        .map(|e| {
            let e = e.unwrap();
            (
                e.file_name().to_string_lossy().into_owned(),
                std::fs::read(e.path()).unwrap(),
            )
        })
        .collect();
    out.sort();
    out
}
