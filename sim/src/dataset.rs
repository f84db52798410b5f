//! Samples, shard files and the dataset folder.
//!
//! A dataset folder holds `grid.toml` (the grid the samples were drawn on, in canonical form),
//! `manifest.json` (what was asked for and which shards are complete) and `shard-NNNNN.bin`
//! files. Shard `j` holds samples `j * shard_size ..` in index order. Its layout:
//!
//! ```text
//! 8 bytes   magic "HFSHARD1"
//! 8 bytes   body length L, little-endian u64
//! L bytes   bincode 2 (standard config) of (ShardHeader, Vec<Sample>)
//! 8 bytes   FNV-1a 64 of the magic, length and body, little-endian
//! ```
//!
//! Files are written to a temporary name, synced and renamed, so a crash leaves either a
//! complete shard or none.

use std::fs::{self, File};
use std::io::Write;
use std::path::{Path, PathBuf};

use serde::{Deserialize, Serialize};

use crate::contingency::Contingency;
use crate::label::Label;
use crate::sampling::{Draw, OperatingPoint, Rejection};

/// Shard layout version written by this build. Version 2: run summaries hold the
/// over-voltage, final-voltage and damping margins, and margins a run did not reach are absent
/// (version 1 wrote nominal values there); datasets of version 1 must be labelled again.
pub const SHARD_FORMAT_VERSION: u32 = 2;
const MAGIC: &[u8; 8] = b"HFSHARD1";

/// Errors of dataset files. Each names the file and says how to fix it.
#[derive(Debug, thiserror::Error)]
#[non_exhaustive]
pub enum DatasetError {
    /// A grid or study file problem.
    #[error(transparent)]
    Input(#[from] holdfast_core::Error),
    /// A file could not be read or written.
    #[error("{path}: {source}")]
    Io {
        /// The file.
        path: PathBuf,
        /// The operating-system error.
        source: std::io::Error,
    },
    /// A shard file is damaged or does not belong.
    #[error("{path}: {problem}; fix: {fix}")]
    Shard {
        /// The file.
        path: PathBuf,
        /// What is wrong.
        problem: String,
        /// What to do.
        fix: String,
    },
    /// The dataset folder cannot be used as asked.
    #[error("{path}: {message}")]
    Folder {
        /// The folder.
        path: PathBuf,
        /// What is wrong and what to do.
        message: String,
    },
}

pub(crate) fn io_error(path: &Path) -> impl FnOnce(std::io::Error) -> DatasetError + '_ {
    move |source| DatasetError::Io {
        path: path.to_path_buf(),
        source,
    }
}

/// The operating point as stored: the draw and the solved state, per element in grid order,
/// engineering units.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct PointRecord {
    /// The random parameters.
    pub draw: Draw,
    /// Active load per load, MW.
    pub load_p_mw: Vec<f64>,
    /// Reactive load per load, Mvar.
    pub load_q_mvar: Vec<f64>,
    /// Whether each synchronous machine is committed.
    pub machine_on: Vec<bool>,
    /// Output per machine, MW (0 when off).
    pub machine_p_mw: Vec<f64>,
    /// Reactive output per machine, Mvar.
    pub machine_q_mvar: Vec<f64>,
    /// Output per wind plant, MW.
    pub wind_p_mw: Vec<f64>,
    /// Voltage magnitude per bus, pu.
    pub bus_v_pu: Vec<f64>,
    /// Voltage angle per bus, degrees.
    pub bus_angle_deg: Vec<f64>,
    /// Total load, MW.
    pub total_load_mw: f64,
    /// Total wind output, MW.
    pub total_wind_mw: f64,
    /// Stored kinetic energy of the committed machines, MW s.
    pub inertia_mws: f64,
}

impl PointRecord {
    /// Records an operating point.
    pub fn of(op: &OperatingPoint) -> PointRecord {
        let g = &op.grid;
        let s = g.s_base_mva;
        let on: Vec<bool> = (0..g.machines.len())
            .map(|k| {
                g.machines[k].in_service
                    && !op
                        .outages
                        .machines
                        .contains(&holdfast_core::MachineIdx(k as u32))
            })
            .collect();
        let inertia_mws = g
            .machines
            .iter()
            .zip(&on)
            .filter(|(_, on)| **on)
            .filter_map(|(m, _)| m.dynamics.as_ref().map(|d| d.h_s * m.rating_mva))
            .sum();
        let loads = g
            .loads
            .iter()
            .map(|l| if l.in_service { l.p_pu } else { 0.0 });
        PointRecord {
            draw: op.draw.clone(),
            load_p_mw: loads.clone().map(|p| p * s).collect(),
            load_q_mvar: g
                .loads
                .iter()
                .map(|l| if l.in_service { l.q_pu * s } else { 0.0 })
                .collect(),
            machine_p_mw: op
                .pf
                .machine_p_pu
                .iter()
                .zip(&on)
                .map(|(p, on)| if *on { p * s } else { 0.0 })
                .collect(),
            machine_q_mvar: op
                .pf
                .machine_q_pu
                .iter()
                .zip(&on)
                .map(|(q, on)| if *on { q * s } else { 0.0 })
                .collect(),
            machine_on: on,
            wind_p_mw: g
                .wind_plants
                .iter()
                .map(|w| if w.in_service { w.p_pu * s } else { 0.0 })
                .collect(),
            bus_v_pu: op.pf.v_pu.clone(),
            bus_angle_deg: op.pf.angle_rad.iter().map(|a| a.to_degrees()).collect(),
            total_load_mw: loads.sum::<f64>() * s,
            total_wind_mw: g
                .wind_plants
                .iter()
                .filter(|w| w.in_service)
                .map(|w| w.p_pu * s)
                .sum(),
            inertia_mws,
        }
    }
}

/// One sample: sample `index` of a study, whatever became of it.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct Sample {
    /// Index within the study.
    pub index: u64,
    /// Why each rejected draw before the kept one (or all draws) was rejected.
    pub rejections: Vec<Rejection>,
    /// What became of it.
    pub body: SampleBody,
}

/// The content of a sample.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub enum SampleBody {
    /// Labelled.
    Labelled(Box<Labelled>),
    /// Every draw was rejected (see `rejections`).
    Rejected,
    /// The operating point was kept but could not be simulated (e.g. a model that cannot start
    /// at rest there); the message says why.
    Failed {
        /// The operating point.
        point: Box<PointRecord>,
        /// What went wrong.
        message: String,
    },
}

/// A labelled sample.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct Labelled {
    /// The operating point.
    pub point: PointRecord,
    /// The contingency.
    pub contingency: Contingency,
    /// Delay of the shed action after clearing (or after the trip), s.
    pub delay_s: f64,
    /// Time of the shed action in the run, s.
    pub action_at_s: f64,
    /// The label.
    pub label: Label,
}

/// Header of a shard file.
#[derive(Clone, Debug, PartialEq, Eq, Serialize, Deserialize)]
pub struct ShardHeader {
    /// Shard layout version.
    pub format_version: u32,
    /// Fingerprint of the grid (FNV-1a 64 of its canonical grid file).
    pub grid_fingerprint: u64,
    /// Hash of the study file.
    pub study_hash: u64,
    /// Shard number.
    pub shard: u32,
    /// Index of its first sample.
    pub first_sample: u64,
    /// Number of samples.
    pub count: u32,
}

pub use holdfast_core::format::grid_fingerprint;

/// The file name of shard `j`.
pub fn shard_file_name(j: u32) -> String {
    format!("shard-{j:05}.bin")
}

/// Encodes a shard.
pub fn encode_shard(header: &ShardHeader, samples: &[Sample]) -> Vec<u8> {
    let cfg = bincode::config::standard();
    // Encoding plain data into a Vec cannot fail.
    let body = bincode::serde::encode_to_vec((header, samples), cfg).unwrap_or_default();
    holdfast_core::format::seal(MAGIC, &body)
}

/// Decodes a shard, checking its layout and checksum; `path` names it in errors.
pub fn decode_shard(bytes: &[u8], path: &Path) -> Result<(ShardHeader, Vec<Sample>), DatasetError> {
    let damaged = |problem: String| DatasetError::Shard {
        path: path.to_path_buf(),
        problem,
        fix: "re-run the same `holdfast dataset build` command with --resume: it writes damaged \
              shards again"
            .to_string(),
    };
    let body = holdfast_core::format::unseal(MAGIC, bytes).map_err(damaged)?;
    let cfg = bincode::config::standard();
    let ((header, samples), _): ((ShardHeader, Vec<Sample>), usize) =
        bincode::serde::decode_from_slice(body, cfg)
            .map_err(|e| damaged(format!("cannot decode: {e}")))?;
    if header.format_version != SHARD_FORMAT_VERSION {
        return Err(DatasetError::Shard {
            path: path.to_path_buf(),
            problem: format!(
                "shard format version {} (this build reads {SHARD_FORMAT_VERSION})",
                header.format_version
            ),
            fix: "read it with the build that wrote it, or rebuild the dataset".to_string(),
        });
    }
    if samples.len() != header.count as usize {
        return Err(damaged(format!(
            "header announces {} samples, {} found",
            header.count,
            samples.len()
        )));
    }
    Ok((header, samples))
}

/// Reads and checks a shard file.
pub fn read_shard(path: &Path) -> Result<(ShardHeader, Vec<Sample>), DatasetError> {
    let bytes = fs::read(path).map_err(io_error(path))?;
    decode_shard(&bytes, path)
}

/// Writes `bytes` to `path` atomically: temporary file in the same folder, sync, rename, sync
/// of the folder.
pub fn write_atomic(path: &Path, bytes: &[u8]) -> Result<(), DatasetError> {
    let dir = path.parent().unwrap_or(Path::new("."));
    let name = path
        .file_name()
        .map(|n| n.to_string_lossy().into_owned())
        .unwrap_or_default();
    let tmp = dir.join(format!(".{name}.tmp-{}", std::process::id()));
    {
        let mut f = File::create(&tmp).map_err(io_error(&tmp))?;
        f.write_all(bytes).map_err(io_error(&tmp))?;
        f.sync_all().map_err(io_error(&tmp))?;
    }
    fs::rename(&tmp, path).map_err(io_error(path))?;
    // Make the rename itself durable.
    if let Ok(d) = File::open(dir) {
        let _ = d.sync_all();
    }
    Ok(())
}

/// What a dataset folder was asked to hold.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct Manifest {
    /// Manifest layout version.
    pub format_version: u32,
    /// Study name.
    pub study_name: String,
    /// Study hash (hex).
    pub study_hash: String,
    /// Grid fingerprint (hex).
    pub grid_fingerprint: String,
    /// Samples asked for.
    pub samples: u64,
    /// Samples per shard.
    pub shard_size: u64,
    /// Shards in the whole dataset.
    pub shard_count: u32,
    /// Completed shards found in the folder, ascending.
    pub complete: Vec<u32>,
}

impl Manifest {
    /// Shard `j`'s first sample and count.
    pub fn shard_range(&self, j: u32) -> (u64, u32) {
        let first = u64::from(j) * self.shard_size;
        let count = self.shard_size.min(self.samples.saturating_sub(first));
        (first, count as u32)
    }

    /// Reads a manifest.
    pub fn read(dir: &Path) -> Result<Manifest, DatasetError> {
        let path = dir.join("manifest.json");
        let text = fs::read_to_string(&path).map_err(io_error(&path))?;
        serde_json::from_str(&text).map_err(|e| DatasetError::Shard {
            path,
            problem: format!("not a readable manifest ({e})"),
            fix: "restore it, or rebuild the dataset into an empty folder".to_string(),
        })
    }

    /// Writes it atomically.
    pub fn write(&self, dir: &Path) -> Result<(), DatasetError> {
        let path = dir.join("manifest.json");
        let mut text = serde_json::to_string_pretty(self).unwrap_or_default();
        text.push('\n');
        write_atomic(&path, text.as_bytes())
    }
}

/// Hex form of a 64-bit hash, as stored in manifests.
pub fn hex(x: u64) -> String {
    format!("{x:016x}")
}
