//! Holdfast's training pipeline: GraphSAGE over the bus and branch graphs, and a plain
//! multilayer-perceptron baseline, trained on burn's CPU backend with an under-shed-averse
//! loss; split-conformal safety margin; export to the model file that `holdfast-infer` reads.
//!
//! - [`data`]: dataset folder to featurised examples and splits (by operating point).
//! - [`loss`]: the averse, neutral and pinball losses, on tensors and in plain arithmetic.
//! - [`net`]: batches and the forward pass on burn tensors.
//! - [`evaluate`]: metrics and re-simulation of every case with the advised shed.
//! - [`train`]: Adam, early stopping, checkpoints, fine-tuning, calibration.
//!
//! The features, the model file and the serving forward pass are defined in `holdfast-infer`,
//! so training and serving cannot disagree.

pub mod data;
pub mod evaluate;
pub mod loss;
pub mod net;
pub mod train;

#[cfg(not(any(feature = "flex", feature = "ndarray")))]
compile_error!("enable one burn backend: cargo feature `flex` (the default) or `ndarray`");
