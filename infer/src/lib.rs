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
//! [`advise`] serves: the [`Advisor`] predicts a shed, re-checks it with `holdfast-core`'s
//! dynamic engine and escalates to a safer action when the check fails.
//!
//! ```no_run
//! use holdfast_infer::{Advisor, Request};
//! # fn main() -> Result<(), Box<dyn std::error::Error>> {
//! let advisor = Advisor::open("models/quillmoor.hfmodel".as_ref(), "scenarios/quillmoor.toml".as_ref())?;
//! let request: Request = serde_json::from_str(&std::fs::read_to_string("request.json")?)?;
//! let advice = advisor.advise(&request)?;
//! println!("{:?}: shed {:.1} MW ({:?})", advice.path, advice.total_mw, advice.outcome);
//! # Ok(())
//! # }
//! ```
//!
//! Decision support for studies and operators, not a protection scheme: local grid codes,
//! operating procedures and licensed engineers decide.

pub mod advise;
pub mod features;
pub mod forward;
pub mod model;

pub use advise::{
    Advice, AdvicePath, AdviseError, Advisor, Budget, CAUTION, CheckOutcome, ContingencySpec,
    Request, Workspace, answer_json_line, from_json,
};
pub use features::{
    Disturbance, DisturbanceKind, FeatureBuffers, GraphInput, GridContext, Snapshot, featurise,
    featurise_into,
};
pub use forward::{ForwardBuffers, Network, apply_margin};
pub use model::{Architecture, ModelError, ModelFile, RecheckSettings};
