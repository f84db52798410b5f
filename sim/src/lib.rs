//! Holdfast's dataset generator: from a grid and a study file, labelled samples, each an
//! operating point, a contingency, and the smallest load shed (per bus) that keeps the grid
//! stable.
//!
//! - [`study`]: the study file (sampling, contingencies, shedding, criteria, tolerance).
//! - [`sampling`]: operating points: load level and area factors, wind through the power
//!   curve, commitment and dispatch, power flow, acceptance.
//! - [`contingency`]: the contingency set and the draw of one per sample.
//! - [`shed`]: candidate buses and the placement rules.
//! - [`label`]: bisection on the total shed over simulations continued from one snapshot.
//! - [`dataset`]: samples, shard files (checked, written atomically) and the manifest.
//! - [`generate`]: sample `i` from its own random stream; parallel, resumable, split builds.
//! - [`report`]: merging, statistics and export.
//!
//! Sample `i` depends only on the study (its seed) and `i`: the same study gives
//! byte-identical shards whatever the thread count, the split into parts, or restarts.
//!
//! Decision support for studies, not a protection scheme: local grid codes, operating
//! procedures and licensed engineers decide what is shed.

pub mod contingency;
pub mod dataset;
pub mod generate;
pub mod label;
pub mod npz;
pub mod plan;
pub mod report;
pub mod sampling;
pub mod shed;
pub mod study;
