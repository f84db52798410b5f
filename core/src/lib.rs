//! Holdfast's shared foundation: the grid model, our grid file format, the IEEE Common Data Format
//! importer, topology, the AC power flow and the time-domain dynamic engine.
//!
//! # Main types
//! - [`Grid`]: a validated grid in per unit, with dense typed indices ([`BusIdx`], [`BranchIdx`],
//!   [`MachineIdx`], [`WindIdx`], [`LoadIdx`], [`ShuntIdx`]).
//! - [`format`](mod@format): the grid file (TOML, `format_version = 1`) and its loader, which reports every
//!   problem with file, line, field and value.
//! - [`cdf`]: import of IEEE Common Data Format files, including their solved voltages.
//! - [`topology`]: the bus graph, the branch graph, islands and electrical distance.
//! - [`powerflow`]: Newton-Raphson AC power flow on a sparse LU, with reactive limits and islands.
//! - [`dynamics`]: time-domain simulation of contingencies with a stability verdict.
//! - [`Outages`]: a mask of elements out of service for one study; elements are never removed.
//!
//! # Units and sign conventions
//! Everything inside is per unit on the grid's base `s_base_mva` and each bus's `base_kv`, with
//! angles in radians; engineering units (MW, Mvar, kV, ohm, degrees) appear only in the file
//! formats and in display code. Field names carry their unit (`p_mw`, `x_pu`, `h_s`).
//! - Power injected into a bus is positive (generator convention for machines and wind plants;
//!   loads are given as consumption and enter the balance negatively).
//! - Branch flow is measured at each end, flowing from that end's bus into the branch; the
//!   `from` end carries the transformer's off-nominal tap and phase shift.
//! - Reactive power of a shunt is positive when capacitive (`b_pu > 0` produces Mvar).
//! - Each energised island has one reference bus whose voltage angle is zero.
//!
//! # Example
//! ```
//! use holdfast_core::{format, powerflow};
//! let text = r#"
//! format_version = 1
//! name = "two-bus example"
//! s_base_mva = 100.0
//! frequency_hz = 50.0
//! [[bus]]
//! id = 1
//! name = "Source"
//! base_kv = 230.0
//! reference = true
//! [[bus]]
//! id = 2
//! name = "Town"
//! base_kv = 230.0
//! [[line]]
//! id = "Source-Town"
//! from = 1
//! to = 2
//! r_pu = 0.01
//! x_pu = 0.1
//! [[machine]]
//! id = "G1"
//! bus = 1
//! p_mw = 0.0
//! v_set_pu = 1.0
//! rating_mva = 200.0
//! [[load]]
//! id = "Town load"
//! bus = 2
//! p_mw = 50.0
//! q_mvar = 10.0
//! "#;
//! let grid = format::parse_grid(text, "example.toml".as_ref())?;
//! let solution = powerflow::solve(&grid, &Default::default(), &Default::default()).converged()?;
//! let v_town = solution.v_pu[1];
//! assert!(v_town < 1.0 && v_town > 0.9);
//! # Ok::<(), holdfast_core::Error>(())
//! ```

#![deny(missing_docs)]

mod blocklu;
pub mod cdf;
pub mod dynamics;
mod error;
pub mod format;
mod model;
pub mod powerflow;
pub mod shed;
pub mod synthetic;
pub mod topology;
pub mod ybus;

pub use error::{Error, Problem};
pub use model::*;

/// The complex number type used throughout Holdfast (re-exported from `num-complex`).
pub type Complex = num_complex::Complex<f64>;
