//! Holdfast's dataset generator (not built yet).
//!
//! This crate will own the study file (sampling of operating points and contingencies, shed
//! settings, stability criteria), the minimal-shed bisection that labels each sample, and the
//! resumable, sharded dataset writer. It depends on `holdfast-core` only.
//!
//! For now it re-exports the core crate so that the dependency edge is in place.

pub use holdfast_core as core_crate;
