//! Holdfast's lean inference library (not built yet).
//!
//! This crate will own the serving contract shared by training and inference: the feature schema
//! and featurisation of a grid state into bus-graph and branch-graph inputs, the model-file format,
//! a plain-Rust forward pass, and the `Advisor` that re-checks an advised shed with the dynamic
//! engine of `holdfast-core` and falls back to a safer action when the check fails.
//! It never depends on a training framework, rayon or indicatif.

pub use holdfast_core as core_crate;
