//! The time-domain dynamic engine: device models, events, the integrator and the stability
//! verdict.
//!
//! - [`simulate`] runs a [`Scenario`] of timed [`Event`]s from a converged power flow and returns
//!   a [`Verdict`] (which criterion failed, when and where, and the margins), work counters
//!   and, on request, a [`Trajectory`]. [`Simulation`] is the same run step by step; it can be
//!   cloned to continue several ways from a snapshot.
//! - Models: synchronous machines (classical, two-axis, sub-transient) with a bus-fed static
//!   exciter (IEEE 421.5 ST1A type, simplified) or a first-order exciter and a droop
//!   governor with valve limits and reheat; loads with voltage dependence (turning to constant
//!   impedance below a threshold), frequency dependence and an induction-motor share; wind
//!   plants as limited current sources with reactive current injection and ride-through trips.
//! - The numerical method is described on [`Simulation`]; the classical reduced-network route of
//!   the textbooks is kept in [`reduction`] for checks.

mod engine;
mod events;
mod load;
pub mod modes;
pub mod reduction;
mod unit;
mod verdict;
mod wind;

pub use engine::{
    MAX_STEP_HALVINGS, RunStats, Simulation, SimulationOptions, SimulationResult, Trajectory,
    simulate,
};
pub use events::{
    ACTIONS, BOLTED_FAULT_X_PU, ContingencyTiming, Event, Scenario, TimedEvent, contingency_events,
    parse_event_line, parse_scenario, read_scenario,
};
pub use reduction::{
    ClassicalInitialState, ReducedNetwork, classical_initial_states, load_admittances,
    reduce_to_internal_nodes,
};
pub use unit::{MachineModel, MachineModelChoice};
pub use verdict::{
    CriteriaFieldError, Criterion, DAMPING_SAMPLE_S, DampingMargin, Failure, MIN_DAMPING_WINDOW_S,
    Margins, ModeMargin, StabilityCriteria, Trip, TripCause, Verdict,
};
