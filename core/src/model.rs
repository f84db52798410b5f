//! The in-memory grid model: validated, per unit, with dense typed indices.
//!
//! A [`Grid`] is only built by the file loaders ([`crate::format`], [`crate::cdf`]), which
//! validate their input; code that takes a `&Grid` may rely on the invariants listed on [`Grid`].

use std::collections::HashMap;

macro_rules! index_type {
    ($(#[$doc:meta])* $name:ident) => {
        $(#[$doc])*
        ///
        /// Indices are dense (`0..n`) and stable for the life of a [`Grid`]: outages are masks
        /// ([`Outages`]), never removals, so an index never changes meaning.
        #[derive(Clone, Copy, Debug, PartialEq, Eq, PartialOrd, Ord, Hash)]
        pub struct $name(pub u32);

        impl $name {
            /// The index as a `usize`, for slicing.
            #[inline]
            pub fn get(self) -> usize {
                self.0 as usize
            }
        }
    };
}

index_type!(
    /// Position of a bus in [`Grid::buses`].
    BusIdx
);
index_type!(
    /// Position of a branch in [`Grid::branches`].
    BranchIdx
);
index_type!(
    /// Position of a synchronous machine in [`Grid::machines`].
    MachineIdx
);
index_type!(
    /// Position of a wind plant in [`Grid::wind_plants`].
    WindIdx
);
index_type!(
    /// Position of a load in [`Grid::loads`].
    LoadIdx
);
index_type!(
    /// Position of a shunt in [`Grid::shunts`].
    ShuntIdx
);

/// A validated grid, per unit on `s_base_mva` and each bus's `base_kv`.
///
/// Fields are public so that studies can change values (loads, dispatch, set-points) on a copy;
/// adding or removing elements is not supported (the bus-number lookup is built once), and
/// outages belong in an [`Outages`] mask.
///
/// Invariants (established by the loaders): every element refers to an existing bus; ids are
/// unique within their kind; all numbers are finite; every branch has a non-zero series
/// impedance; every island holding an in-service machine has exactly one reference bus, and
/// every reference bus has an in-service machine.
#[derive(Clone, Debug, PartialEq)]
pub struct Grid {
    /// Descriptive name of the grid.
    pub name: String,
    /// System power base, MVA.
    pub s_base_mva: f64,
    /// Nominal frequency, Hz.
    pub frequency_hz: f64,
    /// Buses, indexed by [`BusIdx`].
    pub buses: Vec<Bus>,
    /// Lines and transformers, indexed by [`BranchIdx`].
    pub branches: Vec<Branch>,
    /// Fixed shunts (capacitor banks, reactors), indexed by [`ShuntIdx`].
    pub shunts: Vec<Shunt>,
    /// Loads, indexed by [`LoadIdx`].
    pub loads: Vec<Load>,
    /// Synchronous machines, indexed by [`MachineIdx`].
    pub machines: Vec<SyncMachine>,
    /// Wind plants (full-converter), indexed by [`WindIdx`].
    pub wind_plants: Vec<WindPlant>,
    pub(crate) bus_lookup: HashMap<u32, BusIdx>,
}

impl Grid {
    /// Builds the grid's bus-number lookup. Used by the loaders after validation.
    #[allow(clippy::too_many_arguments)] // reason: one argument per element table, all required
    pub(crate) fn assemble(
        name: String,
        s_base_mva: f64,
        frequency_hz: f64,
        buses: Vec<Bus>,
        branches: Vec<Branch>,
        shunts: Vec<Shunt>,
        loads: Vec<Load>,
        machines: Vec<SyncMachine>,
        wind_plants: Vec<WindPlant>,
    ) -> Grid {
        let bus_lookup = buses
            .iter()
            .enumerate()
            .map(|(i, b)| (b.number, BusIdx(i as u32)))
            .collect();
        Grid {
            name,
            s_base_mva,
            frequency_hz,
            buses,
            branches,
            shunts,
            loads,
            machines,
            wind_plants,
            bus_lookup,
        }
    }

    /// The index of the bus with the given external number, if any.
    pub fn bus_idx(&self, number: u32) -> Option<BusIdx> {
        self.bus_lookup.get(&number).copied()
    }

    /// Number of buses.
    pub fn n_buses(&self) -> usize {
        self.buses.len()
    }

    /// The bus at `idx`.
    pub fn bus(&self, idx: BusIdx) -> &Bus {
        &self.buses[idx.get()]
    }

    /// The branch, machine or wind plant with this id (looked up in that order).
    pub fn element(&self, id: &str) -> Option<Element> {
        if let Some(k) = self.branches.iter().position(|b| b.id == id) {
            Some(Element::Branch(BranchIdx(k as u32)))
        } else if let Some(k) = self.machines.iter().position(|m| m.id == id) {
            Some(Element::Machine(MachineIdx(k as u32)))
        } else {
            self.wind_plants
                .iter()
                .position(|w| w.id == id)
                .map(|k| Element::Wind(WindIdx(k as u32)))
        }
    }

    /// Buses with in-service demand (a load drawing active power), in bus order, each once.
    pub fn load_buses(&self) -> Vec<BusIdx> {
        let mut buses: Vec<BusIdx> = self
            .loads
            .iter()
            .filter(|l| l.in_service && l.p_pu > 0.0)
            .map(|l| l.bus)
            .collect();
        buses.sort_unstable();
        buses.dedup();
        buses
    }

    /// Total load of in-service loads, MW and Mvar, at nominal voltage.
    pub fn total_load_mw_mvar(&self) -> (f64, f64) {
        self.loads
            .iter()
            .filter(|l| l.in_service)
            .fold((0.0, 0.0), |(p, q), l| {
                (p + l.p_pu * self.s_base_mva, q + l.q_pu * self.s_base_mva)
            })
    }
}

/// An element that can be taken out of service or tripped, by index.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum Element {
    /// A line or transformer.
    Branch(BranchIdx),
    /// A synchronous machine.
    Machine(MachineIdx),
    /// A wind plant.
    Wind(WindIdx),
}

/// A bus (node) of the grid.
#[derive(Clone, Debug, PartialEq)]
pub struct Bus {
    /// External bus number from the file; data, never an index.
    pub number: u32,
    /// Descriptive name.
    pub name: String,
    /// Nominal (base) voltage, kV line to line.
    pub base_kv: f64,
    /// Lower limit of the normal voltage band, pu.
    pub v_min_pu: f64,
    /// Upper limit of the normal voltage band, pu.
    pub v_max_pu: f64,
    /// Area number, for reports and per-area sampling.
    pub area: u32,
    /// True if this bus is its island's angle and power reference.
    pub is_reference: bool,
    /// Reference-bus voltage angle, rad (0 unless the file says otherwise).
    pub angle_set_rad: f64,
    /// A solved voltage stored with the data (from an imported solved case), if any.
    pub stored_solution: Option<StoredVoltage>,
}

/// A solved bus voltage carried by an input file (e.g. an IEEE CDF case), kept for comparison.
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct StoredVoltage {
    /// Voltage magnitude, pu.
    pub v_pu: f64,
    /// Voltage angle, rad.
    pub angle_rad: f64,
}

/// What kind of branch this is.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum BranchKind {
    /// An overhead line or cable, modelled as a pi section.
    Line,
    /// A two-winding transformer, possibly with off-nominal tap and phase shift.
    Transformer,
}

/// A line (pi model) or transformer between two buses, per unit on the system base.
///
/// The ideal transformer of ratio `tap_ratio` and angle `phase_shift_rad` sits at the `from`
/// end; the series impedance and the charging split half and half between the ends.
#[derive(Clone, Debug, PartialEq)]
pub struct Branch {
    /// Identifier, unique among branches.
    pub id: String,
    /// Line or transformer.
    pub kind: BranchKind,
    /// From bus (tap side).
    pub from: BusIdx,
    /// To bus.
    pub to: BusIdx,
    /// Series resistance, pu.
    pub r_pu: f64,
    /// Series reactance, pu.
    pub x_pu: f64,
    /// Total shunt charging susceptance, pu (half at each end).
    pub b_pu: f64,
    /// Off-nominal turns ratio at the from end, pu (1.0 for a line). Dimensionless.
    pub tap_ratio: f64,
    /// Phase shift of the from-end ideal transformer, rad (0 for a line).
    pub phase_shift_rad: f64,
    /// Continuous (normal) rating, MVA; 0 means unrated.
    pub rating_mva: f64,
    /// Short-time emergency rating, MVA; 0 means unrated.
    pub emergency_rating_mva: f64,
    /// In service in the base case.
    pub in_service: bool,
}

/// A fixed shunt admittance at a bus, per unit on the system base at 1 pu voltage.
#[derive(Clone, Debug, PartialEq)]
pub struct Shunt {
    /// Identifier, unique among shunts.
    pub id: String,
    /// Bus it connects to.
    pub bus: BusIdx,
    /// Conductance, pu (consumes active power).
    pub g_pu: f64,
    /// Susceptance, pu (positive: capacitive, produces reactive power).
    pub b_pu: f64,
    /// In service in the base case.
    pub in_service: bool,
}

/// How a load's power varies with voltage: the shares of constant impedance, constant current
/// and constant power (each set sums to one). Dimensionless fractions.
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct VoltageDependence {
    /// Constant-impedance share of active power.
    pub p_z: f64,
    /// Constant-current share of active power.
    pub p_i: f64,
    /// Constant-power share of active power.
    pub p_p: f64,
    /// Constant-impedance share of reactive power.
    pub q_z: f64,
    /// Constant-current share of reactive power.
    pub q_i: f64,
    /// Constant-power share of reactive power.
    pub q_p: f64,
}

impl VoltageDependence {
    /// All constant power: the usual power-flow load.
    pub const CONSTANT_POWER: VoltageDependence = VoltageDependence {
        p_z: 0.0,
        p_i: 0.0,
        p_p: 1.0,
        q_z: 0.0,
        q_i: 0.0,
        q_p: 1.0,
    };
}

/// A load at a bus.
///
/// The power flow treats `p_pu`/`q_pu` as constant power; the voltage dependence, motor share
/// and shedding data serve the dynamic studies.
#[derive(Clone, Debug, PartialEq)]
pub struct Load {
    /// Identifier, unique among loads.
    pub id: String,
    /// Bus it connects to.
    pub bus: BusIdx,
    /// Active power at nominal voltage, pu.
    pub p_pu: f64,
    /// Reactive power at nominal voltage, pu.
    pub q_pu: f64,
    /// Voltage dependence of the static (non-motor) part.
    pub voltage_dependence: VoltageDependence,
    /// Load change per unit frequency change (`P = P0 (1 + p Δf)`, `Q = Q0 (1 + q Δf)`, `Δf` in
    /// pu of nominal) of the static part.
    pub frequency_dependence: FrequencyDependence,
    /// Share of the active power drawn by induction motors, in `[0, 1]`. Dimensionless.
    pub motor_share: f64,
    /// The induction-motor model of the motor share (typical data unless the file gives them).
    pub motor: MotorData,
    /// Share of the load that may be shed, in `[0, 1]`. Dimensionless.
    pub sheddable_fraction: f64,
    /// Importance: 0 is the most sheddable; larger numbers are kept longer. Buses with critical
    /// customers carry high priorities and usually a zero sheddable fraction.
    pub priority: u32,
    /// In service in the base case.
    pub in_service: bool,
}

/// Sensitivity of a static load to frequency, pu load change per pu frequency change.
#[derive(Clone, Copy, Debug, Default, PartialEq)]
pub struct FrequencyDependence {
    /// Active power, pu/pu.
    pub p_pu_per_pu: f64,
    /// Reactive power, pu/pu.
    pub q_pu_per_pu: f64,
}

/// An aggregate induction motor, per unit on its own rating (the motor share of the load
/// divided by `loading_factor`), first-order (slip) model.
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct MotorData {
    /// Stator resistance, pu.
    pub rs_pu: f64,
    /// Stator leakage reactance, pu.
    pub xs_pu: f64,
    /// Magnetising reactance, pu.
    pub xm_pu: f64,
    /// Rotor resistance, pu.
    pub rr_pu: f64,
    /// Rotor leakage reactance, pu.
    pub xr_pu: f64,
    /// Inertia constant of motor and driven load, s.
    pub h_s: f64,
    /// Exponent `m` of the load torque `T0 (1 - s)^m` (0: constant torque, 2: fan or pump).
    pub torque_exponent: f64,
    /// Electrical input at the initial voltage as a share of the motor rating, pu.
    pub loading_factor: f64,
    /// Under-voltage trip of the motor share, if fitted.
    pub under_voltage_trip: Option<UnderVoltageTrip>,
}

impl MotorData {
    /// Typical data of an aggregate of small compressor-type motors: mid-range values of the
    /// published ranges for residential and commercial motors (IEEE Task Force on Load
    /// Representation for Dynamic Performance, 1993 and 1995; from memory), constant torque,
    /// loaded to 75 % of rating, no trip.
    pub const TYPICAL: MotorData = MotorData {
        rs_pu: 0.04,
        xs_pu: 0.1,
        xm_pu: 3.0,
        rr_pu: 0.04,
        xr_pu: 0.1,
        h_s: 0.3,
        torque_exponent: 0.0,
        loading_factor: 0.75,
        under_voltage_trip: None,
    };
}

/// A relay that trips a device when its voltage stays below a level for a time.
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct UnderVoltageTrip {
    /// Pick-up voltage, pu.
    pub v_pu: f64,
    /// Time below the pick-up voltage before the trip, s.
    pub delay_s: f64,
}

/// Excitation system of a synchronous machine (block structures after IEEE Std 421.5; our own
/// parameter names). Per unit of field voltage on the machine's air-gap-line base.
#[derive(Clone, Copy, Debug, PartialEq)]
pub enum ExciterData {
    /// Bus-fed static exciter of the IEEE 421.5 ST1A type, simplified: voltage transducer, a
    /// lead-lag (transient gain reduction) and a high-gain amplifier, with the standard's two
    /// kinds of limit: the amplifier's own range (non-windup: its state stops at the limit and
    /// leaves it as soon as its input turns back) and the bridge ceiling and floor, which scale
    /// with the terminal voltage (windup: the output is clipped, the amplifier behind it is
    /// not). Left out: the input limits, the second lead-lag, rate feedback, the commutation
    /// drop `K_C I_FD` and the field-current limiter.
    St1a {
        /// Voltage transducer time constant, s (0: none).
        t_measure_s: f64,
        /// Lead time constant, s.
        t_lead_s: f64,
        /// Lag time constant, s (0: no lead-lag stage).
        t_lag_s: f64,
        /// Amplifier gain, pu/pu.
        gain: f64,
        /// Amplifier time constant, s (0: the amplifier is algebraic, its output the gain
        /// times its input within its range).
        t_amplifier_s: f64,
        /// Upper limit of the amplifier's range, pu (non-windup).
        amplifier_max_pu: f64,
        /// Lower limit of the amplifier's range, pu (non-windup).
        amplifier_min_pu: f64,
        /// Ceiling, pu of terminal voltage (output at most `v_t * field_max_pu`; windup).
        field_max_pu: f64,
        /// Floor, pu of terminal voltage (output at least `v_t * field_min_pu`; windup).
        field_min_pu: f64,
    },
    /// A simple first-order exciter (our own type, not one of IEEE 421.5's): gain and time
    /// constant, its state held within fixed non-windup limits.
    FirstOrder {
        /// Voltage transducer time constant, s (0: none).
        t_measure_s: f64,
        /// Gain, pu/pu.
        gain: f64,
        /// Time constant, s.
        t_s: f64,
        /// Upper output limit, pu.
        field_max_pu: f64,
        /// Lower output limit, pu.
        field_min_pu: f64,
    },
}

/// A power system stabiliser of the IEEE 421.5 single-input type (PSS1A): the rotor speed
/// deviation through a transducer lag, a gain with a washout, two lead-lags and output limits
/// (windup), added to the exciter's input. The torsional filter of the standard is left out.
/// Parameter names are our own.
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct StabiliserData {
    /// Gain, pu of exciter input per pu speed deviation.
    pub gain: f64,
    /// Transducer time constant, s (0: none).
    pub t_transducer_s: f64,
    /// Washout time constant, s.
    pub t_washout_s: f64,
    /// First lead time constant, s.
    pub t_lead_1_s: f64,
    /// First lag time constant, s (0: no first stage).
    pub t_lag_1_s: f64,
    /// Second lead time constant, s.
    pub t_lead_2_s: f64,
    /// Second lag time constant, s (0: no second stage).
    pub t_lag_2_s: f64,
    /// Upper output limit, pu.
    pub output_max_pu: f64,
    /// Lower output limit, pu.
    pub output_min_pu: f64,
}

/// Open-circuit saturation of a synchronous machine, given by two points of its open-circuit
/// curve: the factor `S(v) = (I_field - I_field on the air-gap line) / (I_field on the air-gap
/// line)` at 1.0 and 1.2 pu terminal voltage. Between and beyond them `S` follows the
/// exponential through both points (DOMAIN.md 2.2), applied to the d axis.
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct Saturation {
    /// `S(1.0)`. Dimensionless, positive.
    pub at_1_0: f64,
    /// `S(1.2)`. Dimensionless, above `at_1_0`.
    pub at_1_2: f64,
}

impl Saturation {
    /// The saturation factor at flux (voltage behind the leakage reactance) `psi_pu`.
    pub fn factor(&self, psi_pu: f64) -> f64 {
        self.at_1_0 * (self.at_1_2 / self.at_1_0).powf((psi_pu - 1.0) / 0.2)
    }
}

/// Speed-droop turbine-governor: a valve lag with non-windup limits and an optional reheat
/// lead-lag, on the machine rating.
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct GovernorData {
    /// Droop, pu speed per pu power.
    pub droop_pu: f64,
    /// Valve and steam-chest time constant, s.
    pub t_valve_s: f64,
    /// Reheater time constant, s (0: no reheat stage).
    pub t_reheat_s: f64,
    /// Share of power from the high-pressure stage (the lead of the reheat lead-lag), pu.
    pub hp_fraction: f64,
    /// Upper valve limit, pu of rating.
    pub valve_max_pu: f64,
    /// Lower valve limit, pu of rating.
    pub valve_min_pu: f64,
}

/// One point of a ride-through curve: on a low-voltage curve the plant may trip once its
/// voltage has stayed below `v_pu` for longer than `t_s`; on a high-voltage curve, once it has
/// stayed above.
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct RideThroughPoint {
    /// Voltage, pu.
    pub v_pu: f64,
    /// Longest time beyond that voltage without tripping, s.
    pub t_s: f64,
}

/// The low-voltage no-trip envelope of NERC PRC-024-2 Attachment 2 (as tabulated in DOMAIN
/// notes; verify against the edition in force): below 0.45 pu for 0.15 s, 0.65 pu for 0.3 s,
/// 0.75 pu for 2 s and 0.9 pu for 3 s.
pub const DEFAULT_RIDE_THROUGH: [RideThroughPoint; 4] = [
    RideThroughPoint {
        v_pu: 0.45,
        t_s: 0.15,
    },
    RideThroughPoint {
        v_pu: 0.65,
        t_s: 0.30,
    },
    RideThroughPoint {
        v_pu: 0.75,
        t_s: 2.0,
    },
    RideThroughPoint {
        v_pu: 0.90,
        t_s: 3.0,
    },
];

/// The high-voltage no-trip envelope of NERC PRC-024-2 Attachment 2 (as tabulated in DOMAIN
/// notes; verify against the edition in force): above 1.20 pu the plant may trip at once, above
/// 1.175 pu after 0.2 s, above 1.15 pu after 0.5 s and above 1.10 pu after 1 s.
pub const DEFAULT_HIGH_VOLTAGE_RIDE_THROUGH: [RideThroughPoint; 4] = [
    RideThroughPoint {
        v_pu: 1.20,
        t_s: 0.0,
    },
    RideThroughPoint {
        v_pu: 1.175,
        t_s: 0.2,
    },
    RideThroughPoint {
        v_pu: 1.15,
        t_s: 0.5,
    },
    RideThroughPoint {
        v_pu: 1.10,
        t_s: 1.0,
    },
];

/// Dynamic data of a synchronous machine, per unit on the machine's own rating.
///
/// Used by the dynamic engine; a missing block means the machine has no dynamic model yet.
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct MachineDynamics {
    /// Inertia constant on the machine rating, s.
    pub h_s: f64,
    /// Damping, pu torque per pu speed deviation, on the machine rating.
    pub damping_pu: f64,
    /// Armature resistance, pu.
    pub ra_pu: f64,
    /// d-axis synchronous reactance, pu.
    pub xd_pu: f64,
    /// q-axis synchronous reactance, pu.
    pub xq_pu: f64,
    /// d-axis transient reactance, pu.
    pub xd_transient_pu: f64,
    /// q-axis transient reactance, pu.
    pub xq_transient_pu: f64,
    /// Leakage reactance, pu.
    pub xl_pu: f64,
    /// d-axis transient open-circuit time constant, s.
    pub td0_transient_s: f64,
    /// q-axis transient open-circuit time constant, s (0 for a salient-pole machine).
    pub tq0_transient_s: f64,
    /// Sub-transient data, when the data set has them (many published sets do not).
    pub subtransient: Option<SubtransientData>,
    /// Open-circuit saturation (two-axis and sub-transient models); `None`: unsaturated.
    pub saturation: Option<Saturation>,
}

/// Sub-transient data of a synchronous machine, per unit on its rating.
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct SubtransientData {
    /// d-axis sub-transient reactance, pu.
    pub xd_pu: f64,
    /// q-axis sub-transient reactance, pu.
    pub xq_pu: f64,
    /// d-axis sub-transient open-circuit time constant, s.
    pub td0_s: f64,
    /// q-axis sub-transient open-circuit time constant, s.
    pub tq0_s: f64,
}

/// A synchronous machine (generator or condenser) at a bus.
#[derive(Clone, Debug, PartialEq)]
pub struct SyncMachine {
    /// Identifier, unique among machines.
    pub id: String,
    /// Bus it connects to.
    pub bus: BusIdx,
    /// Scheduled active power output, pu (ignored at a reference bus, which balances the island).
    pub p_pu: f64,
    /// Reactive output used when the machine does not regulate voltage, pu.
    pub q_pu: f64,
    /// Terminal voltage set-point, pu; `None` means the machine does not regulate voltage.
    pub v_set_pu: Option<f64>,
    /// Lower reactive limit, pu.
    pub q_min_pu: f64,
    /// Upper reactive limit, pu.
    pub q_max_pu: f64,
    /// Lower active limit, pu.
    pub p_min_pu: f64,
    /// Upper active limit, pu.
    pub p_max_pu: f64,
    /// Rating, MVA (the base of the dynamic data).
    pub rating_mva: f64,
    /// Dynamic data, if given.
    pub dynamics: Option<MachineDynamics>,
    /// Excitation system, if modelled (else constant field voltage).
    pub exciter: Option<ExciterData>,
    /// Power system stabiliser feeding the exciter, if fitted.
    pub stabiliser: Option<StabiliserData>,
    /// Turbine-governor, if modelled (else constant mechanical power).
    pub governor: Option<GovernorData>,
    /// In service in the base case.
    pub in_service: bool,
}

/// Dynamic data of a full-converter wind plant (aggregated), per unit on its rating.
#[derive(Clone, Debug, PartialEq)]
pub struct WindDynamics {
    /// Converter current limit, pu of rated current.
    pub i_max_pu: f64,
    /// Reactive current injected per pu voltage dip below the dip threshold, pu/pu.
    pub k_reactive_current: f64,
    /// Voltage below which the plant is in fault mode, pu.
    pub v_dip_pu: f64,
    /// Current-control time constant, s.
    pub t_current_s: f64,
    /// Active-current recovery rate after a fault, pu/s.
    pub p_recovery_pu_per_s: f64,
    /// Low-voltage ride-through curve (see [`DEFAULT_RIDE_THROUGH`]); empty: never trips on
    /// low voltage.
    pub ride_through: Vec<RideThroughPoint>,
    /// High-voltage ride-through curve (see [`DEFAULT_HIGH_VOLTAGE_RIDE_THROUGH`]); empty:
    /// never trips on high voltage.
    pub high_voltage_ride_through: Vec<RideThroughPoint>,
}

/// A full-converter wind plant (aggregated) at a bus. It injects fixed P and Q in the power flow.
#[derive(Clone, Debug, PartialEq)]
pub struct WindPlant {
    /// Identifier, unique among wind plants.
    pub id: String,
    /// Bus it connects to.
    pub bus: BusIdx,
    /// Rated active power, pu.
    pub rating_pu: f64,
    /// Active power output, pu.
    pub p_pu: f64,
    /// Reactive power output, pu.
    pub q_pu: f64,
    /// Dynamic data, if given.
    pub dynamics: Option<WindDynamics>,
    /// In service in the base case.
    pub in_service: bool,
}

/// Elements out of service for one study, as a mask over the grid's indices.
///
/// The base-case `in_service` flags still apply; an outage takes an element out on top of them.
#[derive(Clone, Debug, Default, PartialEq, Eq)]
pub struct Outages {
    /// Branches taken out.
    pub branches: Vec<BranchIdx>,
    /// Machines taken out.
    pub machines: Vec<MachineIdx>,
    /// Wind plants taken out.
    pub wind_plants: Vec<WindIdx>,
}

impl Outages {
    /// No outages: the base case.
    pub fn none() -> Outages {
        Outages::default()
    }

    /// Outages of the branches, machines and wind plants with these ids (branch ids are looked
    /// up first, then machines, then wind plants).
    pub fn from_ids<S: AsRef<str>>(grid: &Grid, ids: &[S]) -> Result<Outages, crate::Error> {
        let mut out = Outages::default();
        for id in ids {
            let id = id.as_ref();
            match grid.element(id) {
                Some(Element::Branch(k)) => out.branches.push(k),
                Some(Element::Machine(k)) => out.machines.push(k),
                Some(Element::Wind(k)) => out.wind_plants.push(k),
                None => return Err(crate::Error::UnknownElement { id: id.to_string() }),
            }
        }
        Ok(out)
    }

    /// True if `branch` is in service in the grid and not taken out here.
    pub fn branch_in_service(&self, grid: &Grid, branch: BranchIdx) -> bool {
        grid.branches[branch.get()].in_service && !self.branches.contains(&branch)
    }

    /// True if `machine` is in service in the grid and not taken out here.
    pub fn machine_in_service(&self, grid: &Grid, machine: MachineIdx) -> bool {
        grid.machines[machine.get()].in_service && !self.machines.contains(&machine)
    }

    /// True if `wind` is in service in the grid and not taken out here.
    pub fn wind_in_service(&self, grid: &Grid, wind: WindIdx) -> bool {
        grid.wind_plants[wind.get()].in_service && !self.wind_plants.contains(&wind)
    }
}

impl Grid {
    /// A copy with every in-service load scaled by `factor` (P and Q), and the change in demand
    /// re-dispatched over the in-service voltage-regulating machines that are not at a reference
    /// bus, in proportion to their rating and within their active limits; what they cannot take
    /// is left to the reference machines. Wind output is unchanged.
    ///
    /// This is a simple, documented dispatch rule for studies at light and peak load, not an
    /// economic dispatch.
    pub fn with_load_scaled(&self, factor: f64) -> Grid {
        let mut grid = self.clone();
        let mut delta = 0.0;
        for load in grid.loads.iter_mut().filter(|l| l.in_service) {
            delta += load.p_pu * (factor - 1.0);
            load.p_pu *= factor;
            load.q_pu *= factor;
        }
        // Share delta by rating among dispatchable machines, re-sharing what hits a limit.
        let mut free: Vec<usize> = grid
            .machines
            .iter()
            .enumerate()
            .filter(|(_, m)| {
                m.in_service && m.v_set_pu.is_some() && !grid.buses[m.bus.get()].is_reference
            })
            .map(|(k, _)| k)
            .collect();
        for _ in 0..grid.machines.len().max(1) {
            if free.is_empty() || delta.abs() < 1e-12 {
                break;
            }
            let total: f64 = free.iter().map(|&k| grid.machines[k].rating_mva).sum();
            let mut next = Vec::new();
            let mut left = 0.0;
            for &k in &free {
                let m = &mut grid.machines[k];
                let want = m.p_pu + delta * m.rating_mva / total;
                let got = want.clamp(m.p_min_pu, m.p_max_pu);
                left += want - got;
                m.p_pu = got;
                if got == want {
                    next.push(k);
                }
            }
            delta = left;
            free = next;
        }
        grid
    }
}

#[cfg(test)]
mod tests {
    use crate::format::parse_grid;
    use std::path::Path;

    const THREE_MACHINES: &str = r#"
format_version = 1
name = "dispatch"
s_base_mva = 100.0
frequency_hz = 50.0
[[bus]]
id = 1
base_kv = 230.0
reference = true
[[bus]]
id = 2
base_kv = 230.0
[[line]]
id = "L"
from = 1
to = 2
x_pu = 0.05
[[machine]]
id = "ref"
bus = 1
p_mw = 0.0
v_set_pu = 1.0
rating_mva = 500.0
[[machine]]
id = "big"
bus = 2
p_mw = 100.0
v_set_pu = 1.0
rating_mva = 300.0
p_max_mw = 130.0
[[machine]]
id = "small"
bus = 2
p_mw = 50.0
v_set_pu = 1.0
rating_mva = 100.0
[[load]]
id = "D"
bus = 2
p_mw = 200.0
q_mvar = 50.0
"#;

    #[test]
    fn load_scaling_redispatches_by_rating_within_limits() {
        let grid = parse_grid(THREE_MACHINES, Path::new("t.toml")).unwrap();
        // +20 % of 200 MW = +40 MW, shared 3:1 by rating: big +30 (to 130, its limit), small +10.
        let up = grid.with_load_scaled(1.2);
        assert!((up.loads[0].p_pu - 2.4).abs() < 1e-12 && (up.loads[0].q_pu - 0.6).abs() < 1e-12);
        assert!((up.machines[1].p_pu - 1.3).abs() < 1e-12);
        assert!((up.machines[2].p_pu - 0.6).abs() < 1e-12);
        assert_eq!(
            up.machines[0].p_pu, 0.0,
            "the reference is left to the power flow"
        );
        // +40 %: +80 MW; big is capped at +30, the other 50 goes to small (re-shared).
        let up = grid.with_load_scaled(1.4);
        assert!((up.machines[1].p_pu - 1.3).abs() < 1e-12);
        assert!((up.machines[2].p_pu - 1.0).abs() < 1e-12);
    }
}
