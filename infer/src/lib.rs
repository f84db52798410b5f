//! Holdfast's lean inference library: the feature schema, the model file and a plain-Rust
//! forward pass.
//!
//! This crate owns the contract between training and serving: [`features`] turns a grid state
//! and the contingency that just happened into bus-graph and branch-graph inputs, [`model`]
//! defines the model file (weights as plain arrays, normalisation, safety margin, grid
//! fingerprint, checksum), and [`forward`] runs the network without a training framework.
//! `holdfast-learn` trains against these same definitions, so the two cannot disagree.
//! It never depends on a training framework, rayon or indicatif (a test enforces this).
//!
//! The re-check of an advised action with the dynamic engine and the fallback to a safer one
//! are not built yet.

pub mod features;
pub mod forward;
pub mod model;

pub use features::{Disturbance, DisturbanceKind, GraphInput, GridContext, Snapshot, featurise};
pub use forward::{Network, apply_margin};
pub use model::{Architecture, ModelError, ModelFile};
