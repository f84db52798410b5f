//! The model file: what training writes and serving reads.
//!
//! ```text
//! 8 bytes   magic "HFMODEL1"
//! 8 bytes   body length L, little-endian u64
//! L bytes   bincode 2 (standard config) of ModelFile
//! 8 bytes   FNV-1a 64 of the magic, length and body, little-endian
//! ```
//!
//! The body holds the weights as plain `f32` arrays (row-major; a layer's weight is
//! `[inputs, outputs]` and computes `y = x W + b`), the feature set it was trained on, the
//! normalisation fitted on the training split, the safety margin, the grid's fingerprint and
//! what training did, and the settings the advisor re-checks an action with (copied from the
//! study the training labels came from). Files are written to a temporary name and renamed.
//!
//! Layout history: version 1 had no re-check settings; version 2 adds them; version 3 carries
//! the over-voltage, final-voltage and damping criteria in those settings.

use std::io::Write;
use std::path::{Path, PathBuf};

use holdfast_core::dynamics::{ContingencyTiming, SimulationOptions};
use holdfast_core::format::{seal, unseal};
use holdfast_core::shed::Placement;
use serde::{Deserialize, Serialize};

use crate::features::{BRANCH_FEATURES, BUS_FEATURES, FEATURE_SET_VERSION};

/// Model-file layout version written by this build.
pub const MODEL_FORMAT_VERSION: u32 = 3;
const MAGIC: &[u8; 8] = b"HFMODEL1";

/// Errors of model files and weights, each naming the file or the array.
#[derive(Debug, thiserror::Error)]
#[non_exhaustive]
pub enum ModelError {
    /// The file could not be read or written.
    #[error("{path}: {source}")]
    Io {
        /// The file.
        path: PathBuf,
        /// The operating-system error.
        source: std::io::Error,
    },
    /// The file is not a model file, or it is damaged.
    #[error("{path}: {problem}")]
    Damaged {
        /// The file.
        path: PathBuf,
        /// What is wrong.
        problem: String,
    },
    /// The file was written by a build with another layout or feature set.
    #[error("{path}: {what} version {found}; this build reads version {supported}")]
    Version {
        /// The file.
        path: PathBuf,
        /// Which version.
        what: &'static str,
        /// Version in the file.
        found: u32,
        /// Version this build reads.
        supported: u32,
    },
    /// The model was trained on another grid.
    #[error(
        "{path}: the model was trained on grid \"{model_grid}\" (fingerprint {expected:016x}); \
         this grid has fingerprint {found:016x}: retrain, or fine-tune with --init-from"
    )]
    Grid {
        /// The file.
        path: PathBuf,
        /// Grid name stored in the model.
        model_grid: String,
        /// Fingerprint stored in the model.
        expected: u64,
        /// Fingerprint of the grid given.
        found: u64,
    },
    /// The weights do not fit the architecture.
    #[error("model weights: {0}")]
    Weights(String),
}

/// The network's shape.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub enum Architecture {
    /// GraphSAGE (mean aggregation) on the bus graph and, if `branch_layers > 0`, on the
    /// branch graph, fused into the buses, then a per-bus head.
    Sage {
        /// Width of every hidden layer.
        hidden: usize,
        /// Layers on the bus graph.
        bus_layers: usize,
        /// Layers on the branch graph (0: no branch tower).
        branch_layers: usize,
    },
    /// Baseline: a multilayer perceptron on all features flattened into one vector; fixed to
    /// one grid's bus and branch counts.
    Mlp {
        /// Width of every hidden layer.
        hidden: usize,
        /// Hidden layers.
        layers: usize,
        /// Buses of the grid.
        n_bus: usize,
        /// Branches of the grid.
        n_branch: usize,
    },
}

impl Architecture {
    /// Short name.
    pub fn name(&self) -> &'static str {
        match self {
            Architecture::Sage { .. } => "GraphSAGE",
            Architecture::Mlp { .. } => "MLP",
        }
    }

    /// Every parameter array with its shape, in a fixed order. Training initialises and
    /// exports in this order; serving looks arrays up by name.
    pub fn parameters(&self) -> Vec<(String, Vec<usize>)> {
        let fb = BUS_FEATURES.len();
        let fe = BRANCH_FEATURES.len();
        let mut out = Vec::new();
        match *self {
            Architecture::Sage {
                hidden,
                bus_layers,
                branch_layers,
            } => {
                for (tower, layers, f_in) in
                    [("bus", bus_layers, fb), ("branch", branch_layers, fe)]
                {
                    for l in 0..layers {
                        let i = if l == 0 { f_in } else { hidden };
                        out.push((format!("{tower}{l}.w_self"), vec![i, hidden]));
                        out.push((format!("{tower}{l}.w_neigh"), vec![i, hidden]));
                        out.push((format!("{tower}{l}.bias"), vec![hidden]));
                    }
                }
                let h_bus = if bus_layers == 0 { fb } else { hidden };
                let head_in = if branch_layers > 0 {
                    let h_br = hidden;
                    out.push(("fuse.w_bus".into(), vec![h_bus, hidden]));
                    out.push(("fuse.w_branch".into(), vec![h_br, hidden]));
                    out.push(("fuse.bias".into(), vec![hidden]));
                    hidden
                } else {
                    h_bus
                };
                out.push(("head.w".into(), vec![head_in, 1]));
                out.push(("head.bias".into(), vec![1]));
            }
            Architecture::Mlp {
                hidden,
                layers,
                n_bus,
                n_branch,
            } => {
                let mut i = n_bus * fb + n_branch * fe;
                for l in 0..layers {
                    out.push((format!("mlp{l}.w"), vec![i, hidden]));
                    out.push((format!("mlp{l}.bias"), vec![hidden]));
                    i = hidden;
                }
                out.push(("head.w".into(), vec![i, n_bus]));
                out.push(("head.bias".into(), vec![n_bus]));
            }
        }
        out
    }
}

/// One parameter array.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct Array {
    /// Name, as listed by [`Architecture::parameters`].
    pub name: String,
    /// Shape.
    pub shape: Vec<usize>,
    /// Values, row-major.
    pub data: Vec<f32>,
}

/// Per-feature mean and standard deviation, fitted on the training split; inputs are used as
/// `(x - mean) / std`.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct Normalisation {
    /// Bus-feature means.
    pub bus_mean: Vec<f32>,
    /// Bus-feature standard deviations (1 where a feature does not vary).
    pub bus_std: Vec<f32>,
    /// Branch-feature means.
    pub branch_mean: Vec<f32>,
    /// Branch-feature standard deviations.
    pub branch_std: Vec<f32>,
}

impl Normalisation {
    /// No change: mean 0, deviation 1.
    pub fn identity() -> Normalisation {
        Normalisation {
            bus_mean: vec![0.0; BUS_FEATURES.len()],
            bus_std: vec![1.0; BUS_FEATURES.len()],
            branch_mean: vec![0.0; BRANCH_FEATURES.len()],
            branch_std: vec![1.0; BRANCH_FEATURES.len()],
        }
    }
}

/// The safety margin added to every prediction: each bus sheds
/// `min(sheddable, predicted + share * sheddable)`.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct Margin {
    /// Share of each bus's shed-able load added, 0..1.
    pub share_of_sheddable: f64,
    /// The under-shed rate the margin was chosen for (on samples that need shed).
    pub target_under_rate: f64,
    /// Calibration samples that needed shed.
    pub calibration_samples: usize,
}

impl Margin {
    /// No margin.
    pub fn none() -> Margin {
        Margin {
            share_of_sheddable: 0.0,
            target_under_rate: 1.0,
            calibration_samples: 0,
        }
    }
}

/// What training did, for the record.
#[derive(Clone, Debug, Default, PartialEq, Serialize, Deserialize)]
pub struct TrainingInfo {
    /// The dataset folder trained on.
    pub dataset: String,
    /// Its study's name.
    pub study: String,
    /// Its study's hash (hex), to recognise the dataset again.
    pub study_hash: String,
    /// Seed of the split hash (samples are split by index, which is by operating point).
    pub split_seed: u64,
    /// Shares of validation, calibration and test.
    pub split_shares: [f64; 3],
    /// Loss, as described on the command line.
    pub loss: String,
    /// Samples per split: train, validation, calibration, test.
    pub split_sizes: [usize; 4],
    /// Seed of initialisation, splits and shuffling.
    pub seed: u64,
    /// Epochs run and the epoch whose weights were kept.
    pub epochs_run: usize,
    /// The epoch kept (best validation loss), counted from 1.
    pub best_epoch: usize,
    /// Validation loss of the kept weights.
    pub validation_loss: f64,
    /// Other settings, as `name=value` pairs.
    pub settings: Vec<(String, String)>,
}

/// How the advisor re-checks an action: the simulation the training labels came from, copied
/// from the dataset's study when the model is written.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct RecheckSettings {
    /// When the contingency happens, its clearing time and fault reactance.
    pub timing: ContingencyTiming,
    /// Shortest delay of the action after the contingency settled in the study, s.
    pub action_delay_min_s: f64,
    /// Longest such delay, s (the advisor's default: a later action needs at least as much).
    pub action_delay_max_s: f64,
    /// How the study placed a total over the candidate buses (escalation re-places by it).
    pub placement: Placement,
    /// The study's simulation settings (step, window, models, stability criteria).
    pub simulation: SimulationOptions,
}

/// A model file's contents.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct ModelFile {
    /// Layout version ([`MODEL_FORMAT_VERSION`]).
    pub format_version: u32,
    /// Feature-set version ([`FEATURE_SET_VERSION`]).
    pub feature_set_version: u32,
    /// Bus feature names, in order.
    pub bus_features: Vec<String>,
    /// Branch feature names, in order.
    pub branch_features: Vec<String>,
    /// Network shape.
    pub architecture: Architecture,
    /// Input normalisation.
    pub normalisation: Normalisation,
    /// Parameter arrays.
    pub weights: Vec<Array>,
    /// Safety margin.
    pub margin: Margin,
    /// Fingerprint of the grid trained on (`holdfast_core::format::grid_fingerprint`).
    pub grid_fingerprint: u64,
    /// That grid's name.
    pub grid_name: String,
    /// Training record.
    pub training: TrainingInfo,
    /// How the advisor re-checks an action.
    pub recheck: RecheckSettings,
}

impl ModelFile {
    /// A model with this build's feature set and the given parts.
    pub fn new(
        architecture: Architecture,
        normalisation: Normalisation,
        weights: Vec<Array>,
        grid_fingerprint: u64,
        grid_name: String,
        recheck: RecheckSettings,
    ) -> ModelFile {
        ModelFile {
            format_version: MODEL_FORMAT_VERSION,
            feature_set_version: FEATURE_SET_VERSION,
            bus_features: BUS_FEATURES.iter().map(|s| s.to_string()).collect(),
            branch_features: BRANCH_FEATURES.iter().map(|s| s.to_string()).collect(),
            architecture,
            normalisation,
            weights,
            margin: Margin::none(),
            grid_fingerprint,
            grid_name,
            training: TrainingInfo::default(),
            recheck,
        }
    }

    /// The array called `name`.
    pub fn array(&self, name: &str) -> Option<&Array> {
        self.weights.iter().find(|a| a.name == name)
    }

    /// Checks that every parameter of the architecture is present with its shape and finite
    /// values, and that the normalisation fits the feature set.
    pub fn check(&self) -> Result<(), ModelError> {
        for (name, shape) in self.architecture.parameters() {
            let a = self
                .array(&name)
                .ok_or_else(|| ModelError::Weights(format!("array `{name}` is missing")))?;
            if a.shape != shape || a.data.len() != shape.iter().product::<usize>() {
                return Err(ModelError::Weights(format!(
                    "array `{name}` has shape {:?} and {} values; the architecture needs {shape:?}",
                    a.shape,
                    a.data.len()
                )));
            }
            if let Some(i) = a.data.iter().position(|x| !x.is_finite()) {
                return Err(ModelError::Weights(format!(
                    "array `{name}`, value {i} is {}",
                    a.data[i]
                )));
            }
        }
        let n = &self.normalisation;
        let fb = BUS_FEATURES.len();
        let fe = BRANCH_FEATURES.len();
        if n.bus_mean.len() != fb
            || n.bus_std.len() != fb
            || n.branch_mean.len() != fe
            || n.branch_std.len() != fe
        {
            return Err(ModelError::Weights(
                "the normalisation does not match the feature set".into(),
            ));
        }
        let all = n
            .bus_mean
            .iter()
            .chain(&n.branch_mean)
            .chain(&n.bus_std)
            .chain(&n.branch_std);
        if all.clone().any(|x| !x.is_finite())
            || n.bus_std.iter().chain(&n.branch_std).any(|&s| s <= 0.0)
        {
            return Err(ModelError::Weights(
                "the normalisation has a non-finite mean or a non-positive deviation".into(),
            ));
        }
        let m = self.margin.share_of_sheddable;
        if !(0.0..=1.0).contains(&m) {
            return Err(ModelError::Weights(format!(
                "the safety margin {m} is outside 0..1"
            )));
        }
        Ok(())
    }

    /// The file's bytes.
    pub fn encode(&self) -> Vec<u8> {
        let cfg = bincode::config::standard();
        // Encoding plain data into a Vec cannot fail.
        let body = bincode::serde::encode_to_vec(self, cfg).unwrap_or_default();
        seal(MAGIC, &body)
    }

    /// Reads a model from bytes (`path` names it in errors): magic, length, checksum, layout
    /// and feature-set versions, then [`ModelFile::check`].
    pub fn decode(bytes: &[u8], path: &Path) -> Result<ModelFile, ModelError> {
        let damaged = |problem: String| ModelError::Damaged {
            path: path.to_path_buf(),
            problem,
        };
        let body = unseal(MAGIC, bytes).map_err(damaged)?;
        let cfg = bincode::config::standard().with_limit::<{ 1 << 30 }>();
        // The layout version leads the body: read it alone first, so a file of another layout
        // is named as such rather than reported as undecodable.
        let (format_version, _): (u32, usize) = bincode::serde::decode_from_slice(body, cfg)
            .map_err(|e| damaged(format!("cannot decode the model: {e}")))?;
        if format_version != MODEL_FORMAT_VERSION {
            return Err(ModelError::Version {
                path: path.to_path_buf(),
                what: "model file layout",
                found: format_version,
                supported: MODEL_FORMAT_VERSION,
            });
        }
        let (model, used): (ModelFile, usize) = bincode::serde::decode_from_slice(body, cfg)
            .map_err(|e| damaged(format!("cannot decode the model: {e}")))?;
        if used != body.len() {
            return Err(damaged("trailing bytes after the model".into()));
        }
        if model.feature_set_version != FEATURE_SET_VERSION
            || model.bus_features != BUS_FEATURES
            || model.branch_features != BRANCH_FEATURES
        {
            return Err(ModelError::Version {
                path: path.to_path_buf(),
                what: "feature set",
                found: model.feature_set_version,
                supported: FEATURE_SET_VERSION,
            });
        }
        model.check().map_err(|e| damaged(e.to_string()))?;
        Ok(model)
    }

    /// Reads a model file.
    pub fn read(path: &Path) -> Result<ModelFile, ModelError> {
        let bytes = std::fs::read(path).map_err(|source| ModelError::Io {
            path: path.to_path_buf(),
            source,
        })?;
        ModelFile::decode(&bytes, path)
    }

    /// Writes the model file atomically (temporary name, sync, rename).
    pub fn write(&self, path: &Path) -> Result<(), ModelError> {
        write_atomic(path, &self.encode())
    }

    /// Fails unless the model was trained on a grid with this fingerprint.
    pub fn check_grid(&self, fingerprint: u64, path: &Path) -> Result<(), ModelError> {
        if self.grid_fingerprint == fingerprint {
            Ok(())
        } else {
            Err(ModelError::Grid {
                path: path.to_path_buf(),
                model_grid: self.grid_name.clone(),
                expected: self.grid_fingerprint,
                found: fingerprint,
            })
        }
    }
}

/// Writes bytes to `path` through a temporary file in the same folder, synced and renamed, so
/// a crash leaves the old file or the new one, never a torn one.
pub fn write_atomic(path: &Path, bytes: &[u8]) -> Result<(), ModelError> {
    let io = |source| ModelError::Io {
        path: path.to_path_buf(),
        source,
    };
    let mut tmp = path.as_os_str().to_owned();
    tmp.push(".tmp");
    let tmp = PathBuf::from(tmp);
    {
        let mut f = std::fs::File::create(&tmp).map_err(io)?;
        f.write_all(bytes).map_err(io)?;
        f.sync_all().map_err(io)?;
    }
    std::fs::rename(&tmp, path).map_err(io)
}

#[cfg(test)]
mod tests {
    use super::*;

    fn small_model() -> ModelFile {
        let arch = Architecture::Sage {
            hidden: 4,
            bus_layers: 1,
            branch_layers: 1,
        };
        let weights = arch
            .parameters()
            .into_iter()
            .map(|(name, shape)| {
                let n = shape.iter().product::<usize>();
                Array {
                    name,
                    shape,
                    data: (0..n).map(|k| k as f32 * 0.01).collect(),
                }
            })
            .collect();
        ModelFile::new(
            arch,
            Normalisation::identity(),
            weights,
            42,
            "test grid".into(),
            test_recheck(),
        )
    }

    /// Re-check settings of no particular study (the values matter only to the advisor).
    pub(crate) fn test_recheck() -> RecheckSettings {
        RecheckSettings {
            timing: ContingencyTiming {
                event_at_s: 0.1,
                clearing_time_s: 0.1,
                fault_x_pu: 1e-4,
            },
            action_delay_min_s: 0.1,
            action_delay_max_s: 0.3,
            placement: Placement::DistanceWeighted,
            simulation: SimulationOptions::default(),
        }
    }

    #[test]
    fn a_model_survives_encoding() {
        let m = small_model();
        let back = ModelFile::decode(&m.encode(), Path::new("m.hfmodel")).unwrap();
        assert_eq!(back, m);
    }

    #[test]
    fn damaged_files_are_refused_with_the_file_named() {
        let bytes = small_model().encode();
        let p = Path::new("m.hfmodel");
        // Every truncation, and a flipped bit in every byte: an error, never a panic.
        for cut in 0..bytes.len() {
            let e = ModelFile::decode(&bytes[..cut], p).unwrap_err();
            assert!(e.to_string().starts_with("m.hfmodel: "), "{e}");
        }
        for k in 0..bytes.len() {
            let mut b = bytes.clone();
            b[k] ^= 0x10;
            let e = ModelFile::decode(&b, p).unwrap_err();
            assert!(matches!(e, ModelError::Damaged { .. }), "byte {k}: {e}");
        }
    }

    #[test]
    fn versions_grid_and_shapes_are_checked() {
        let mut m = small_model();
        m.format_version = 99;
        let e = ModelFile::decode(&m.encode(), Path::new("m")).unwrap_err();
        assert_eq!(
            e.to_string(),
            "m: model file layout version 99; this build reads version 3"
        );
        let mut m = small_model();
        m.bus_features.swap(0, 1);
        assert!(matches!(
            ModelFile::decode(&m.encode(), Path::new("m")),
            Err(ModelError::Version {
                what: "feature set",
                ..
            })
        ));
        let m = small_model();
        assert!(m.check_grid(42, Path::new("m")).is_ok());
        let e = m.check_grid(7, Path::new("m")).unwrap_err();
        assert!(
            e.to_string().contains("trained on grid \"test grid\""),
            "{e}"
        );
        let mut m = small_model();
        m.weights[0].data.pop();
        assert!(m.check().unwrap_err().to_string().contains("bus0.w_self"));
        let mut m = small_model();
        m.weights.remove(3);
        assert!(m.check().unwrap_err().to_string().contains("is missing"));
        let mut m = small_model();
        m.margin.share_of_sheddable = 1.5;
        assert!(m.check().is_err());
    }
}
