//! Holdfast's training pipeline (not built yet).
//!
//! This crate will own the GraphSAGE model over the bus and branch graphs and its baselines, the
//! under-shed-averse loss, training with early stopping and checkpoints, conformal calibration of
//! the safety margin, evaluation by re-simulation, and export to the model file that
//! `holdfast-infer` reads. It will run on burn's CPU backend; burn is added with that work, so
//! that builds stay quick until then.

pub use holdfast_infer as infer_crate;
pub use holdfast_sim as sim_crate;
