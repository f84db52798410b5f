//! Grid file, format version 1: the record types and their validation into a [`Grid`].

use std::collections::{HashMap, HashSet};
use std::f64::consts::PI;
use std::fmt::Display;
use std::ops::Range;
use std::path::Path;

use serde::{Deserialize, Serialize};
use toml::Spanned;

use crate::model::*;
use crate::{Error, Problem};

/// Largest series reactance or resistance accepted, pu on the system base. Anything larger is
/// almost always a unit slip (ohm entered as pu).
const ABSURD_IMPEDANCE_PU: f64 = 100.0;
/// Largest total charging susceptance accepted, pu (1,000 km of 500 kV line is about 13 pu).
const ABSURD_CHARGING_PU: f64 = 100.0;
/// Largest single load, machine or wind plant accepted, in multiples of the system base.
const ABSURD_POWER_PU: f64 = 1000.0;
/// Tolerance on the sum of voltage-dependence shares.
const SHARE_SUM_TOL: f64 = 1e-6;

fn default_true() -> bool {
    true
}
fn default_v_min() -> f64 {
    0.9
}
fn default_v_max() -> f64 {
    1.1
}
fn default_area() -> u32 {
    1
}
fn default_one() -> f64 {
    1.0
}
fn is_true(b: &bool) -> bool {
    *b
}
fn is_false(b: &bool) -> bool {
    !*b
}
fn is_one(x: &f64) -> bool {
    *x == 1.0
}
fn is_zero(x: &f64) -> bool {
    *x == 0.0
}

#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
struct FileIn {
    #[allow(dead_code)] // reason: read and checked by `peek_version`
    format_version: i64,
    name: Spanned<String>,
    s_base_mva: Spanned<f64>,
    frequency_hz: Spanned<f64>,
    #[serde(default)]
    bus: Vec<Spanned<BusRecord>>,
    #[serde(default)]
    line: Vec<Spanned<LineRecord>>,
    #[serde(default)]
    transformer: Vec<Spanned<TransformerRecord>>,
    #[serde(default)]
    shunt: Vec<Spanned<ShuntRecord>>,
    #[serde(default)]
    load: Vec<Spanned<LoadRecord>>,
    #[serde(default)]
    machine: Vec<Spanned<MachineRecord>>,
    #[serde(default)]
    wind: Vec<Spanned<WindRecord>>,
}

#[derive(Serialize)]
struct FileOut<'a> {
    format_version: i64,
    name: &'a str,
    s_base_mva: f64,
    frequency_hz: f64,
    #[serde(skip_serializing_if = "<[_]>::is_empty")]
    bus: Vec<BusRecord>,
    #[serde(skip_serializing_if = "<[_]>::is_empty")]
    line: Vec<LineRecord>,
    #[serde(skip_serializing_if = "<[_]>::is_empty")]
    transformer: Vec<TransformerRecord>,
    #[serde(skip_serializing_if = "<[_]>::is_empty")]
    shunt: Vec<ShuntRecord>,
    #[serde(skip_serializing_if = "<[_]>::is_empty")]
    load: Vec<LoadRecord>,
    #[serde(skip_serializing_if = "<[_]>::is_empty")]
    machine: Vec<MachineRecord>,
    #[serde(skip_serializing_if = "<[_]>::is_empty")]
    wind: Vec<WindRecord>,
}

#[derive(Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
struct BusRecord {
    id: u32,
    #[serde(default, skip_serializing_if = "String::is_empty")]
    name: String,
    base_kv: f64,
    #[serde(default = "default_v_min")]
    v_min_pu: f64,
    #[serde(default = "default_v_max")]
    v_max_pu: f64,
    #[serde(default = "default_area")]
    area: u32,
    #[serde(default, skip_serializing_if = "is_false")]
    reference: bool,
    #[serde(default, skip_serializing_if = "is_zero")]
    angle_deg: f64,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    solved_v_pu: Option<f64>,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    solved_angle_deg: Option<f64>,
}

#[derive(Serialize, Deserialize, Default)]
#[serde(deny_unknown_fields)]
struct LineRecord {
    id: String,
    from: u32,
    to: u32,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    r_pu: Option<f64>,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    x_pu: Option<f64>,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    b_pu: Option<f64>,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    r_ohm: Option<f64>,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    x_ohm: Option<f64>,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    b_us: Option<f64>,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    length_km: Option<f64>,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    r_ohm_per_km: Option<f64>,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    x_ohm_per_km: Option<f64>,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    b_us_per_km: Option<f64>,
    #[serde(default, skip_serializing_if = "is_zero")]
    rating_mva: f64,
    #[serde(default, skip_serializing_if = "is_zero")]
    emergency_rating_mva: f64,
    #[serde(default = "default_true", skip_serializing_if = "is_true")]
    in_service: bool,
}

#[derive(Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
struct TransformerRecord {
    id: String,
    from: u32,
    to: u32,
    #[serde(default)]
    r_pu: f64,
    x_pu: f64,
    #[serde(default, skip_serializing_if = "is_zero")]
    b_pu: f64,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    z_base_mva: Option<f64>,
    #[serde(default = "default_one", skip_serializing_if = "is_one")]
    tap_ratio: f64,
    #[serde(default, skip_serializing_if = "is_zero")]
    phase_shift_deg: f64,
    #[serde(default, skip_serializing_if = "is_zero")]
    rating_mva: f64,
    #[serde(default, skip_serializing_if = "is_zero")]
    emergency_rating_mva: f64,
    #[serde(default = "default_true", skip_serializing_if = "is_true")]
    in_service: bool,
}

#[derive(Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
struct ShuntRecord {
    id: String,
    bus: u32,
    #[serde(default, skip_serializing_if = "is_zero")]
    g_mw: f64,
    #[serde(default)]
    b_mvar: f64,
    #[serde(default = "default_true", skip_serializing_if = "is_true")]
    in_service: bool,
}

#[derive(Serialize, Deserialize, Clone, Copy)]
#[serde(deny_unknown_fields)]
struct VoltageDependenceRecord {
    p_z: f64,
    p_i: f64,
    p_p: f64,
    q_z: f64,
    q_i: f64,
    q_p: f64,
}

#[derive(Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
struct LoadRecord {
    id: String,
    bus: u32,
    p_mw: f64,
    #[serde(default)]
    q_mvar: f64,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    voltage_dependence: Option<VoltageDependenceRecord>,
    #[serde(default, skip_serializing_if = "is_zero")]
    p_per_frequency_pu: f64,
    #[serde(default, skip_serializing_if = "is_zero")]
    q_per_frequency_pu: f64,
    #[serde(default, skip_serializing_if = "is_zero")]
    motor_share: f64,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    motor: Option<MotorRecord>,
    #[serde(default, skip_serializing_if = "is_zero")]
    sheddable_fraction: f64,
    #[serde(default, skip_serializing_if = "is_zero_u32")]
    priority: u32,
    #[serde(default = "default_true", skip_serializing_if = "is_true")]
    in_service: bool,
}

fn is_zero_u32(x: &u32) -> bool {
    *x == 0
}

#[derive(Serialize, Deserialize, Clone, Copy)]
#[serde(deny_unknown_fields)]
struct UnderVoltageTripRecord {
    v_pu: f64,
    delay_s: f64,
}

#[derive(Serialize, Deserialize, Clone, Copy)]
#[serde(deny_unknown_fields)]
struct MotorRecord {
    rs_pu: f64,
    xs_pu: f64,
    xm_pu: f64,
    rr_pu: f64,
    xr_pu: f64,
    h_s: f64,
    #[serde(default)]
    torque_exponent: f64,
    loading_factor: f64,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    under_voltage_trip: Option<UnderVoltageTripRecord>,
}

#[derive(Serialize, Deserialize, Clone, Copy)]
#[serde(tag = "kind", rename_all = "snake_case", deny_unknown_fields)]
enum ExciterRecord {
    St1a {
        #[serde(default)]
        t_measure_s: f64,
        #[serde(default)]
        t_lead_s: f64,
        #[serde(default)]
        t_lag_s: f64,
        gain: f64,
        t_amplifier_s: f64,
        #[serde(default, skip_serializing_if = "Option::is_none")]
        amplifier_max_pu: Option<f64>,
        #[serde(default, skip_serializing_if = "Option::is_none")]
        amplifier_min_pu: Option<f64>,
        field_max_pu: f64,
        field_min_pu: f64,
    },
    FirstOrder {
        #[serde(default)]
        t_measure_s: f64,
        gain: f64,
        t_s: f64,
        field_max_pu: f64,
        field_min_pu: f64,
    },
}

#[derive(Serialize, Deserialize, Clone, Copy)]
#[serde(tag = "kind", rename_all = "snake_case", deny_unknown_fields)]
enum StabiliserRecord {
    Pss1a {
        gain: f64,
        #[serde(default)]
        t_transducer_s: f64,
        t_washout_s: f64,
        #[serde(default)]
        t_lead_1_s: f64,
        #[serde(default)]
        t_lag_1_s: f64,
        #[serde(default)]
        t_lead_2_s: f64,
        #[serde(default)]
        t_lag_2_s: f64,
        output_max_pu: f64,
        output_min_pu: f64,
    },
}

#[derive(Serialize, Deserialize, Clone, Copy)]
#[serde(deny_unknown_fields)]
struct GovernorRecord {
    droop_pu: f64,
    t_valve_s: f64,
    #[serde(default)]
    t_reheat_s: f64,
    #[serde(default)]
    hp_fraction: f64,
    valve_max_pu: f64,
    #[serde(default)]
    valve_min_pu: f64,
}

#[derive(Serialize, Deserialize, Clone, Copy)]
#[serde(deny_unknown_fields)]
struct RideThroughRecord {
    v_pu: f64,
    t_s: f64,
}

#[derive(Serialize, Deserialize, Clone, Copy)]
#[serde(deny_unknown_fields)]
struct MachineDynamicsRecord {
    h_s: f64,
    #[serde(default)]
    damping_pu: f64,
    #[serde(default)]
    ra_pu: f64,
    xd_pu: f64,
    xq_pu: f64,
    xd_transient_pu: f64,
    xq_transient_pu: f64,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    xd_subtransient_pu: Option<f64>,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    xq_subtransient_pu: Option<f64>,
    xl_pu: f64,
    td0_transient_s: f64,
    #[serde(default)]
    tq0_transient_s: f64,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    td0_subtransient_s: Option<f64>,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    tq0_subtransient_s: Option<f64>,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    saturation_at_1_0: Option<f64>,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    saturation_at_1_2: Option<f64>,
}

#[derive(Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
struct MachineRecord {
    id: String,
    bus: u32,
    p_mw: f64,
    #[serde(default, skip_serializing_if = "is_zero")]
    q_mvar: f64,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    v_set_pu: Option<f64>,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    q_min_mvar: Option<f64>,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    q_max_mvar: Option<f64>,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    p_min_mw: Option<f64>,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    p_max_mw: Option<f64>,
    rating_mva: f64,
    #[serde(default = "default_true", skip_serializing_if = "is_true")]
    in_service: bool,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    dynamics: Option<MachineDynamicsRecord>,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    exciter: Option<ExciterRecord>,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    stabiliser: Option<StabiliserRecord>,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    governor: Option<GovernorRecord>,
}

#[derive(Serialize, Deserialize, Clone)]
#[serde(deny_unknown_fields)]
struct WindDynamicsRecord {
    i_max_pu: f64,
    k_reactive_current: f64,
    v_dip_pu: f64,
    t_current_s: f64,
    p_recovery_pu_per_s: f64,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    ride_through: Option<Vec<RideThroughRecord>>,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    high_voltage_ride_through: Option<Vec<RideThroughRecord>>,
}

#[derive(Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
struct WindRecord {
    id: String,
    bus: u32,
    rating_mw: f64,
    p_mw: f64,
    #[serde(default, skip_serializing_if = "is_zero")]
    q_mvar: f64,
    #[serde(default = "default_true", skip_serializing_if = "is_true")]
    in_service: bool,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    dynamics: Option<WindDynamicsRecord>,
}

/// Collects problems while converting records, and locates fields in the text.
struct Checker<'a> {
    text: &'a str,
    problems: Vec<Problem>,
}

/// Where a record sits in the file, and how to name it.
struct Site {
    span: Range<usize>,
    label: String,
}

impl Checker<'_> {
    fn line_of(&self, offset: usize) -> usize {
        super::line_col(self.text, offset).0
    }

    /// The line of `field` inside the record at `span`, or the record's first line.
    fn field_line(&self, span: &Range<usize>, field: &str) -> usize {
        let span = &record_region(self.text, span);
        let body = self.text.get(span.clone()).unwrap_or("");
        let mut offset = span.start;
        for line in body.split_inclusive('\n') {
            let trimmed = line.trim_start();
            if let Some(rest) = trimmed.strip_prefix(field) {
                let rest = rest.trim_start();
                if rest.starts_with('=') {
                    return self.line_of(offset);
                }
            }
            // Inline tables: `{ field = ... }` on one line.
            if line.contains(&format!("{field} =")) || line.contains(&format!("{field}=")) {
                return self.line_of(offset);
            }
            offset += line.len();
        }
        self.line_of(span.start)
    }

    fn report(
        &mut self,
        site: &Site,
        field: &str,
        value: impl Display,
        message: impl Into<String>,
    ) {
        let line = self.field_line(&site.span, field);
        self.problems
            .push(Problem::new(Some(line), site.label.clone(), message).field(field, value));
    }

    fn report_record(&mut self, site: &Site, message: impl Into<String>) {
        let line = self.line_of(site.span.start);
        self.problems
            .push(Problem::new(Some(line), site.label.clone(), message));
    }

    /// Checks that a number is finite and inside `[min, max]`; returns it either way.
    fn number(&mut self, site: &Site, field: &str, value: f64, min: f64, max: f64) -> f64 {
        if !value.is_finite() {
            self.report(site, field, value, "must be a finite number");
        } else if value < min || value > max {
            self.report(
                site,
                field,
                value,
                format!("outside the plausible range [{min}, {max}]"),
            );
        }
        value
    }

    fn positive(&mut self, site: &Site, field: &str, value: f64, max: f64) -> f64 {
        if !value.is_finite() {
            self.report(site, field, value, "must be a finite number");
        } else if value <= 0.0 {
            self.report(site, field, value, "must be positive");
        } else if value > max {
            self.report(
                site,
                field,
                value,
                format!("implausibly large (more than {max})"),
            );
        }
        value
    }

    fn bus_ref(
        &mut self,
        site: &Site,
        field: &str,
        number: u32,
        lookup: &HashMap<u32, BusIdx>,
    ) -> BusIdx {
        match lookup.get(&number) {
            Some(&idx) => idx,
            None => {
                self.report(site, field, number, "no bus with this id");
                BusIdx(0)
            }
        }
    }

    fn unique_id(&mut self, site: &Site, kind: &str, id: &str, seen: &mut HashSet<String>) {
        if id.trim().is_empty() {
            self.report(site, "id", "\"\"", format!("a {kind} needs a non-empty id"));
        } else if !seen.insert(id.to_string()) {
            self.report(
                site,
                "id",
                format!("\"{id}\""),
                format!("duplicate {kind} id"),
            );
        }
    }
}

fn site<T>(record: &Spanned<T>, label: String) -> Site {
    Site {
        span: record.span(),
        label,
    }
}

/// The text region of a record: for a `[[table]]` entry, from its header to the next header;
/// for an inline table, its own span.
fn record_region(text: &str, span: &Range<usize>) -> Range<usize> {
    let start = span.start.min(text.len());
    let rest = text.get(start..).unwrap_or("");
    if !rest.starts_with('[') {
        return start..span.end.min(text.len()).max(start);
    }
    let mut offset = start;
    for (n, line) in rest.split_inclusive('\n').enumerate() {
        if n > 0 && line.trim_start().starts_with('[') {
            return start..offset;
        }
        offset += line.len();
    }
    start..text.len()
}

pub(super) fn parse(text: &str, path: &Path) -> Result<Grid, Error> {
    let file: FileIn = toml::from_str(text).map_err(|e| super::syntax_error(text, path, &e))?;
    let mut c = Checker {
        text,
        problems: Vec::new(),
    };
    let header = |span: Range<usize>| Site {
        span,
        label: "file header".to_string(),
    };
    let s_base_mva = c.positive(
        &header(file.s_base_mva.span()),
        "s_base_mva",
        *file.s_base_mva.get_ref(),
        1e5,
    );
    let frequency_hz = c.number(
        &header(file.frequency_hz.span()),
        "frequency_hz",
        *file.frequency_hz.get_ref(),
        16.0,
        400.0,
    );
    let s_base = if s_base_mva.is_finite() && s_base_mva > 0.0 {
        s_base_mva
    } else {
        100.0
    };

    // Buses first: everything else refers to them.
    let mut buses = Vec::with_capacity(file.bus.len());
    let mut lookup = HashMap::new();
    let mut bus_sites = Vec::with_capacity(file.bus.len());
    for rec in &file.bus {
        let b = rec.get_ref();
        let s = site(rec, format!("bus {}", b.id));
        if lookup.insert(b.id, BusIdx(buses.len() as u32)).is_some() {
            c.report(&s, "id", b.id, "duplicate bus id");
        }
        let base_kv = c.positive(&s, "base_kv", b.base_kv, 2000.0);
        c.number(&s, "v_min_pu", b.v_min_pu, 0.0, 2.0);
        c.number(&s, "v_max_pu", b.v_max_pu, 0.0, 2.0);
        if b.v_min_pu >= b.v_max_pu {
            c.report(
                &s,
                "v_max_pu",
                b.v_max_pu,
                format!("must exceed v_min_pu = {}", b.v_min_pu),
            );
        }
        c.number(&s, "angle_deg", b.angle_deg, -360.0, 360.0);
        let stored_solution = match (b.solved_v_pu, b.solved_angle_deg) {
            (Some(v), Some(a)) => {
                c.number(&s, "solved_v_pu", v, 0.0, 2.0);
                c.number(&s, "solved_angle_deg", a, -360.0, 360.0);
                Some(StoredVoltage {
                    v_pu: v,
                    angle_rad: a.to_radians(),
                })
            }
            (None, None) => None,
            (Some(_), None) => {
                c.report_record(&s, "solved_v_pu given without solved_angle_deg");
                None
            }
            (None, Some(_)) => {
                c.report_record(&s, "solved_angle_deg given without solved_v_pu");
                None
            }
        };
        buses.push(Bus {
            number: b.id,
            name: b.name.clone(),
            base_kv,
            v_min_pu: b.v_min_pu,
            v_max_pu: b.v_max_pu,
            area: b.area,
            is_reference: b.reference,
            angle_set_rad: b.angle_deg.to_radians(),
            stored_solution,
        });
        bus_sites.push(s);
    }

    let mut branches = Vec::new();
    let mut branch_ids = HashSet::new();
    for rec in &file.line {
        let l = rec.get_ref();
        let s = site(rec, format!("line \"{}\"", l.id));
        c.unique_id(&s, "branch", &l.id, &mut branch_ids);
        let from = c.bus_ref(&s, "from", l.from, &lookup);
        let to = c.bus_ref(&s, "to", l.to, &lookup);
        let z_base_ohm = {
            let kv = buses.get(from.get()).map_or(1.0, |b| b.base_kv);
            kv * kv / s_base
        };
        let (r_pu, x_pu, b_pu) = line_impedance(&mut c, &s, l, z_base_ohm);
        check_branch_common(
            &mut c,
            &s,
            l.from,
            l.to,
            r_pu,
            x_pu,
            b_pu,
            l.rating_mva,
            l.emergency_rating_mva,
        );
        if let (Some(bf), Some(bt)) = (buses.get(from.get()), buses.get(to.get()))
            && l.from != l.to
            && (bf.base_kv - bt.base_kv).abs() > 1e-6 * bf.base_kv.max(bt.base_kv)
        {
            c.report(
                &s,
                "to",
                l.to,
                format!(
                    "a line joins buses of different base voltage ({} kV and {} kV); use a transformer",
                    bf.base_kv, bt.base_kv
                ),
            );
        }
        branches.push(Branch {
            id: l.id.clone(),
            kind: BranchKind::Line,
            from,
            to,
            r_pu,
            x_pu,
            b_pu,
            tap_ratio: 1.0,
            phase_shift_rad: 0.0,
            rating_mva: l.rating_mva,
            emergency_rating_mva: l.emergency_rating_mva,
            in_service: l.in_service,
        });
    }
    for rec in &file.transformer {
        let t = rec.get_ref();
        let s = site(rec, format!("transformer \"{}\"", t.id));
        c.unique_id(&s, "branch", &t.id, &mut branch_ids);
        let from = c.bus_ref(&s, "from", t.from, &lookup);
        let to = c.bus_ref(&s, "to", t.to, &lookup);
        let scale = match t.z_base_mva {
            Some(z_base) => s_base / c.positive(&s, "z_base_mva", z_base, 1e5),
            None => 1.0,
        };
        let (r_pu, x_pu, b_pu) = (t.r_pu * scale, t.x_pu * scale, t.b_pu / scale);
        check_branch_common(
            &mut c,
            &s,
            t.from,
            t.to,
            r_pu,
            x_pu,
            b_pu,
            t.rating_mva,
            t.emergency_rating_mva,
        );
        c.number(&s, "tap_ratio", t.tap_ratio, 0.5, 2.0);
        c.number(&s, "phase_shift_deg", t.phase_shift_deg, -90.0, 90.0);
        branches.push(Branch {
            id: t.id.clone(),
            kind: BranchKind::Transformer,
            from,
            to,
            r_pu,
            x_pu,
            b_pu,
            tap_ratio: t.tap_ratio,
            phase_shift_rad: t.phase_shift_deg.to_radians(),
            rating_mva: t.rating_mva,
            emergency_rating_mva: t.emergency_rating_mva,
            in_service: t.in_service,
        });
    }

    let mut shunts = Vec::new();
    let mut ids = HashSet::new();
    for rec in &file.shunt {
        let sh = rec.get_ref();
        let s = site(rec, format!("shunt \"{}\"", sh.id));
        c.unique_id(&s, "shunt", &sh.id, &mut ids);
        let bus = c.bus_ref(&s, "bus", sh.bus, &lookup);
        let limit = ABSURD_POWER_PU * s_base;
        c.number(&s, "g_mw", sh.g_mw, -limit, limit);
        c.number(&s, "b_mvar", sh.b_mvar, -limit, limit);
        shunts.push(Shunt {
            id: sh.id.clone(),
            bus,
            g_pu: sh.g_mw / s_base,
            b_pu: sh.b_mvar / s_base,
            in_service: sh.in_service,
        });
    }

    let mut loads = Vec::new();
    let mut ids = HashSet::new();
    for rec in &file.load {
        let l = rec.get_ref();
        let s = site(rec, format!("load \"{}\"", l.id));
        c.unique_id(&s, "load", &l.id, &mut ids);
        let bus = c.bus_ref(&s, "bus", l.bus, &lookup);
        let limit = ABSURD_POWER_PU * s_base;
        c.number(&s, "p_mw", l.p_mw, -limit, limit);
        c.number(&s, "q_mvar", l.q_mvar, -limit, limit);
        c.number(&s, "motor_share", l.motor_share, 0.0, 1.0);
        c.number(&s, "sheddable_fraction", l.sheddable_fraction, 0.0, 1.0);
        let voltage_dependence = match l.voltage_dependence {
            None => VoltageDependence::CONSTANT_POWER,
            Some(vd) => {
                for (name, v) in [
                    ("p_z", vd.p_z),
                    ("p_i", vd.p_i),
                    ("p_p", vd.p_p),
                    ("q_z", vd.q_z),
                    ("q_i", vd.q_i),
                    ("q_p", vd.q_p),
                ] {
                    c.number(&s, &format!("voltage_dependence.{name}"), v, 0.0, 1.0);
                }
                let (sp, sq) = (vd.p_z + vd.p_i + vd.p_p, vd.q_z + vd.q_i + vd.q_p);
                if (sp - 1.0).abs() > SHARE_SUM_TOL {
                    c.report(
                        &s,
                        "voltage_dependence",
                        format!("p_z + p_i + p_p = {sp}"),
                        "shares must sum to 1",
                    );
                }
                if (sq - 1.0).abs() > SHARE_SUM_TOL {
                    c.report(
                        &s,
                        "voltage_dependence",
                        format!("q_z + q_i + q_p = {sq}"),
                        "shares must sum to 1",
                    );
                }
                VoltageDependence {
                    p_z: vd.p_z,
                    p_i: vd.p_i,
                    p_p: vd.p_p,
                    q_z: vd.q_z,
                    q_i: vd.q_i,
                    q_p: vd.q_p,
                }
            }
        };
        c.number(&s, "p_per_frequency_pu", l.p_per_frequency_pu, -10.0, 10.0);
        c.number(&s, "q_per_frequency_pu", l.q_per_frequency_pu, -10.0, 10.0);
        let motor = l
            .motor
            .map_or(MotorData::TYPICAL, |m| motor_data(&mut c, &s, m));
        loads.push(Load {
            id: l.id.clone(),
            bus,
            p_pu: l.p_mw / s_base,
            q_pu: l.q_mvar / s_base,
            voltage_dependence,
            frequency_dependence: FrequencyDependence {
                p_pu_per_pu: l.p_per_frequency_pu,
                q_pu_per_pu: l.q_per_frequency_pu,
            },
            motor_share: l.motor_share,
            motor,
            sheddable_fraction: l.sheddable_fraction,
            priority: l.priority,
            in_service: l.in_service,
        });
    }

    let mut machines = Vec::new();
    let mut machine_sites = Vec::new();
    let mut ids = HashSet::new();
    for rec in &file.machine {
        let m = rec.get_ref();
        let s = site(rec, format!("machine \"{}\"", m.id));
        c.unique_id(&s, "machine", &m.id, &mut ids);
        let bus = c.bus_ref(&s, "bus", m.bus, &lookup);
        let limit = ABSURD_POWER_PU * s_base;
        let rating_mva = c.positive(&s, "rating_mva", m.rating_mva, limit);
        c.number(&s, "p_mw", m.p_mw, -limit, limit);
        c.number(&s, "q_mvar", m.q_mvar, -limit, limit);
        if let Some(v) = m.v_set_pu {
            c.number(&s, "v_set_pu", v, 0.8, 1.2);
        }
        let q_min = m
            .q_min_mvar
            .map(|q| c.number(&s, "q_min_mvar", q, -limit, limit));
        let q_max = m
            .q_max_mvar
            .map(|q| c.number(&s, "q_max_mvar", q, -limit, limit));
        if let (Some(lo), Some(hi)) = (q_min, q_max)
            && lo > hi
        {
            c.report(
                &s,
                "q_max_mvar",
                hi,
                format!("must not be below q_min_mvar = {lo}"),
            );
        }
        let p_min = m
            .p_min_mw
            .map(|p| c.number(&s, "p_min_mw", p, -limit, limit));
        let p_max = m
            .p_max_mw
            .map(|p| c.number(&s, "p_max_mw", p, -limit, limit));
        if let (Some(lo), Some(hi)) = (p_min, p_max)
            && lo > hi
        {
            c.report(
                &s,
                "p_max_mw",
                hi,
                format!("must not be below p_min_mw = {lo}"),
            );
        }
        let dynamics = m.dynamics.map(|d| machine_dynamics(&mut c, &s, d));
        let exciter = m.exciter.map(|e| exciter_data(&mut c, &s, e));
        let stabiliser = m.stabiliser.map(|p| stabiliser_data(&mut c, &s, p));
        let governor = m.governor.map(|g| governor_data(&mut c, &s, g));
        if dynamics.is_none() && (exciter.is_some() || governor.is_some()) {
            c.report_record(
                &s,
                "an exciter or governor needs the machine's [machine.dynamics] data",
            );
        }
        if stabiliser.is_some() && exciter.is_none() {
            c.report_record(
                &s,
                "a stabiliser acts through the exciter: give [machine.exciter] too",
            );
        }
        machines.push(SyncMachine {
            id: m.id.clone(),
            bus,
            p_pu: m.p_mw / s_base,
            q_pu: m.q_mvar / s_base,
            v_set_pu: m.v_set_pu,
            q_min_pu: q_min.map_or(f64::NEG_INFINITY, |q| q / s_base),
            q_max_pu: q_max.map_or(f64::INFINITY, |q| q / s_base),
            p_min_pu: p_min.map_or(f64::NEG_INFINITY, |p| p / s_base),
            p_max_pu: p_max.map_or(f64::INFINITY, |p| p / s_base),
            rating_mva,
            dynamics,
            exciter,
            stabiliser,
            governor,
            in_service: m.in_service,
        });
        machine_sites.push(s);
    }

    let mut wind_plants = Vec::new();
    let mut ids = HashSet::new();
    for rec in &file.wind {
        let w = rec.get_ref();
        let s = site(rec, format!("wind plant \"{}\"", w.id));
        c.unique_id(&s, "wind plant", &w.id, &mut ids);
        let bus = c.bus_ref(&s, "bus", w.bus, &lookup);
        let limit = ABSURD_POWER_PU * s_base;
        let rating = c.positive(&s, "rating_mw", w.rating_mw, limit);
        c.number(&s, "p_mw", w.p_mw, 0.0, rating.max(0.0) * 1.0001);
        c.number(&s, "q_mvar", w.q_mvar, -limit, limit);
        let dynamics = w.dynamics.as_ref().map(|d| {
            c.number(&s, "dynamics.i_max_pu", d.i_max_pu, 0.5, 3.0);
            c.number(
                &s,
                "dynamics.k_reactive_current",
                d.k_reactive_current,
                0.0,
                10.0,
            );
            c.number(&s, "dynamics.v_dip_pu", d.v_dip_pu, 0.5, 1.0);
            c.number(&s, "dynamics.t_current_s", d.t_current_s, 1e-4, 1.0);
            c.number(
                &s,
                "dynamics.p_recovery_pu_per_s",
                d.p_recovery_pu_per_s,
                0.01,
                1000.0,
            );
            let ride_through = match &d.ride_through {
                None => DEFAULT_RIDE_THROUGH.to_vec(),
                Some(points) => ride_through_curve(&mut c, &s, "ride_through", points, (0.0, 1.0)),
            };
            let high_voltage_ride_through = match &d.high_voltage_ride_through {
                None => DEFAULT_HIGH_VOLTAGE_RIDE_THROUGH.to_vec(),
                Some(points) => {
                    ride_through_curve(&mut c, &s, "high_voltage_ride_through", points, (1.0, 3.0))
                }
            };
            WindDynamics {
                i_max_pu: d.i_max_pu,
                k_reactive_current: d.k_reactive_current,
                v_dip_pu: d.v_dip_pu,
                t_current_s: d.t_current_s,
                p_recovery_pu_per_s: d.p_recovery_pu_per_s,
                ride_through,
                high_voltage_ride_through,
            }
        });
        wind_plants.push(WindPlant {
            id: w.id.clone(),
            bus,
            rating_pu: w.rating_mw / s_base,
            p_pu: w.p_mw / s_base,
            q_pu: w.q_mvar / s_base,
            dynamics,
            in_service: w.in_service,
        });
    }

    if !c.problems.is_empty() {
        return Err(Error::Invalid {
            path: path.to_path_buf(),
            problems: c.problems,
        });
    }

    let grid = Grid::assemble(
        file.name.get_ref().clone(),
        s_base,
        frequency_hz,
        buses,
        branches,
        shunts,
        loads,
        machines,
        wind_plants,
    );
    let mut problems = Vec::new();
    for problem in crate::topology::check_references(&grid) {
        let line = match problem.bus {
            Some(bus) => c.line_of(bus_sites[bus.get()].span.start),
            None => 1,
        };
        problems.push(Problem::new(Some(line), problem.record, problem.message));
    }
    for problem in check_voltage_setpoints(&grid) {
        let (machine, message) = problem;
        let s = &machine_sites[machine.get()];
        let line = c.field_line(&s.span, "v_set_pu");
        problems.push(Problem::new(Some(line), s.label.clone(), message));
    }
    if problems.is_empty() {
        Ok(grid)
    } else {
        problems.sort_by_key(|p| p.line);
        Err(Error::Invalid {
            path: path.to_path_buf(),
            problems,
        })
    }
}

/// Machines at one bus that regulate voltage must agree on the set-point.
fn check_voltage_setpoints(grid: &Grid) -> Vec<(MachineIdx, String)> {
    let mut first: HashMap<BusIdx, (MachineIdx, f64)> = HashMap::new();
    let mut out = Vec::new();
    for (i, m) in grid.machines.iter().enumerate() {
        let (Some(v), true) = (m.v_set_pu, m.in_service) else {
            continue;
        };
        let idx = MachineIdx(i as u32);
        match first.get(&m.bus) {
            Some(&(other, v_other)) if (v - v_other).abs() > 1e-9 => out.push((
                idx,
                format!(
                    "v_set_pu = {v} disagrees with machine \"{}\" at the same bus ({v_other})",
                    grid.machines[other.get()].id
                ),
            )),
            Some(_) => {}
            None => {
                first.insert(m.bus, (idx, v));
            }
        }
    }
    out
}

fn line_impedance(
    c: &mut Checker<'_>,
    s: &Site,
    l: &LineRecord,
    z_base_ohm: f64,
) -> (f64, f64, f64) {
    let per_unit = l.r_pu.is_some() || l.x_pu.is_some() || l.b_pu.is_some();
    let ohm = l.r_ohm.is_some() || l.x_ohm.is_some() || l.b_us.is_some();
    let per_km = l.length_km.is_some()
        || l.r_ohm_per_km.is_some()
        || l.x_ohm_per_km.is_some()
        || l.b_us_per_km.is_some();
    let forms = [per_unit, ohm, per_km].iter().filter(|&&f| f).count();
    if forms != 1 {
        c.report_record(
            s,
            "give the impedance in exactly one form: r_pu/x_pu/b_pu, r_ohm/x_ohm/b_us, \
             or length_km with r_ohm_per_km/x_ohm_per_km/b_us_per_km",
        );
        return (0.0, 1.0, 0.0);
    }
    if per_unit {
        let Some(x) = l.x_pu else {
            c.report_record(s, "missing field `x_pu`");
            return (0.0, 1.0, 0.0);
        };
        (l.r_pu.unwrap_or(0.0), x, l.b_pu.unwrap_or(0.0))
    } else if ohm {
        let Some(x) = l.x_ohm else {
            c.report_record(s, "missing field `x_ohm`");
            return (0.0, 1.0, 0.0);
        };
        (
            l.r_ohm.unwrap_or(0.0) / z_base_ohm,
            x / z_base_ohm,
            l.b_us.unwrap_or(0.0) * 1e-6 * z_base_ohm,
        )
    } else {
        let (Some(len), Some(x)) = (l.length_km, l.x_ohm_per_km) else {
            c.report_record(s, "the per-km form needs `length_km` and `x_ohm_per_km`");
            return (0.0, 1.0, 0.0);
        };
        let len = c.positive(s, "length_km", len, 5000.0);
        (
            l.r_ohm_per_km.unwrap_or(0.0) * len / z_base_ohm,
            x * len / z_base_ohm,
            l.b_us_per_km.unwrap_or(0.0) * len * 1e-6 * z_base_ohm,
        )
    }
}

#[allow(clippy::too_many_arguments)] // reason: the shared checks of lines and transformers
fn check_branch_common(
    c: &mut Checker<'_>,
    s: &Site,
    from: u32,
    to: u32,
    r_pu: f64,
    x_pu: f64,
    b_pu: f64,
    rating_mva: f64,
    emergency_rating_mva: f64,
) {
    if from == to {
        c.report(s, "to", to, "a branch must join two different buses");
    }
    for (field, v, max) in [
        ("r", r_pu, ABSURD_IMPEDANCE_PU),
        ("x", x_pu, ABSURD_IMPEDANCE_PU),
        ("b", b_pu, ABSURD_CHARGING_PU),
    ] {
        let field = field_name(c, s, field);
        if !v.is_finite() {
            c.report(s, &field, v, "must be a finite number");
        } else if v.abs() > max {
            let written = raw_value(c.text, &s.span, &field).unwrap_or_default();
            c.report(
                s,
                &field,
                written,
                format!(
                    "gives {v:.4} pu; |value| above {max} pu on the system base; check the units"
                ),
            );
        }
    }
    if r_pu.is_finite() && x_pu.is_finite() && r_pu.hypot(x_pu) < 1e-9 {
        c.report(
            s,
            &field_name(c, s, "x"),
            x_pu,
            "zero series impedance; merge the two buses instead",
        );
    }
    if r_pu < 0.0 {
        c.report(s, &field_name(c, s, "r"), r_pu, "negative resistance");
    }
    c.number(s, "rating_mva", rating_mva, 0.0, 1e6);
    c.number(s, "emergency_rating_mva", emergency_rating_mva, 0.0, 1e6);
}

/// The field name the user actually wrote for impedance component `part` ("r", "x" or "b").
fn field_name(c: &Checker<'_>, s: &Site, part: &str) -> String {
    let body = c.text.get(record_region(c.text, &s.span)).unwrap_or("");
    let candidates: &[&str] = match part {
        "r" => &["r_pu", "r_ohm_per_km", "r_ohm"],
        "x" => &["x_pu", "x_ohm_per_km", "x_ohm"],
        _ => &["b_pu", "b_us_per_km", "b_us"],
    };
    candidates
        .iter()
        .find(|name| {
            body.lines().any(|l| {
                l.trim_start()
                    .strip_prefix(**name)
                    .is_some_and(|r| r.trim_start().starts_with('='))
            })
        })
        .unwrap_or(&candidates[0])
        .to_string()
}

/// The value of `field` as written in the record, if it is on a line of its own.
fn raw_value(text: &str, span: &Range<usize>, field: &str) -> Option<String> {
    let body = text.get(record_region(text, span))?;
    body.lines().find_map(|l| {
        let rest = l
            .trim_start()
            .strip_prefix(field)?
            .trim_start()
            .strip_prefix('=')?;
        Some(rest.split('#').next().unwrap_or("").trim().to_string())
    })
}

fn machine_dynamics(c: &mut Checker<'_>, s: &Site, d: MachineDynamicsRecord) -> MachineDynamics {
    c.positive(s, "dynamics.h_s", d.h_s, 30.0);
    c.number(s, "dynamics.damping_pu", d.damping_pu, 0.0, 100.0);
    c.number(s, "dynamics.ra_pu", d.ra_pu, 0.0, 0.5);
    for (name, v) in [
        ("xd_pu", d.xd_pu),
        ("xq_pu", d.xq_pu),
        ("xd_transient_pu", d.xd_transient_pu),
        ("xq_transient_pu", d.xq_transient_pu),
        ("xl_pu", d.xl_pu),
        ("td0_transient_s", d.td0_transient_s),
    ] {
        c.positive(s, &format!("dynamics.{name}"), v, 100.0);
    }
    c.number(s, "dynamics.tq0_transient_s", d.tq0_transient_s, 0.0, 100.0);
    let subtransient = match (
        d.xd_subtransient_pu,
        d.xq_subtransient_pu,
        d.td0_subtransient_s,
        d.tq0_subtransient_s,
    ) {
        (Some(xd), Some(xq), Some(td0), Some(tq0)) => {
            for (name, v) in [
                ("xd_subtransient_pu", xd),
                ("xq_subtransient_pu", xq),
                ("td0_subtransient_s", td0),
                ("tq0_subtransient_s", tq0),
            ] {
                c.positive(s, &format!("dynamics.{name}"), v, 100.0);
            }
            Some(SubtransientData {
                xd_pu: xd,
                xq_pu: xq,
                td0_s: td0,
                tq0_s: tq0,
            })
        }
        (None, None, None, None) => None,
        _ => {
            c.report_record(
                s,
                "give all four sub-transient fields (xd_subtransient_pu, xq_subtransient_pu, \
                 td0_subtransient_s, tq0_subtransient_s) or none",
            );
            None
        }
    };
    // Common practice (no single source): the reactances must fall from synchronous to
    // sub-transient and stay above leakage, or the machine equations lose meaning.
    let (lowest_d, lowest_q) = match subtransient {
        Some(sub) => (
            ("xd_subtransient_pu", sub.xd_pu),
            ("xq_subtransient_pu", sub.xq_pu),
        ),
        None => (
            ("xd_transient_pu", d.xd_transient_pu),
            ("xq_transient_pu", d.xq_transient_pu),
        ),
    };
    let mut order = vec![
        ("xd_pu", d.xd_pu, "xd_transient_pu", d.xd_transient_pu),
        ("xq_pu", d.xq_pu, "xq_transient_pu", d.xq_transient_pu),
    ];
    if let Some(sub) = subtransient {
        order.push((
            "xd_transient_pu",
            d.xd_transient_pu,
            "xd_subtransient_pu",
            sub.xd_pu,
        ));
        order.push((
            "xq_transient_pu",
            d.xq_transient_pu,
            "xq_subtransient_pu",
            sub.xq_pu,
        ));
    }
    order.push((lowest_d.0, lowest_d.1, "xl_pu", d.xl_pu));
    order.push((lowest_q.0, lowest_q.1, "xl_pu", d.xl_pu));
    for (big, vb, small, vs) in order {
        if vs > vb {
            c.report(
                s,
                &format!("dynamics.{small}"),
                vs,
                format!("must not exceed dynamics.{big} = {vb}"),
            );
        }
    }
    let saturation = match (d.saturation_at_1_0, d.saturation_at_1_2) {
        (None, None) => None,
        (Some(at_1_0), Some(at_1_2)) => {
            c.number(s, "dynamics.saturation_at_1_0", at_1_0, 1e-4, 1.0);
            c.number(s, "dynamics.saturation_at_1_2", at_1_2, 1e-4, 5.0);
            if at_1_2 <= at_1_0 {
                c.report(
                    s,
                    "dynamics.saturation_at_1_2",
                    at_1_2,
                    format!("must exceed dynamics.saturation_at_1_0 = {at_1_0}"),
                );
            }
            Some(Saturation { at_1_0, at_1_2 })
        }
        _ => {
            c.report_record(
                s,
                "give both saturation points (saturation_at_1_0, saturation_at_1_2) or none",
            );
            None
        }
    };
    MachineDynamics {
        h_s: d.h_s,
        damping_pu: d.damping_pu,
        ra_pu: d.ra_pu,
        xd_pu: d.xd_pu,
        xq_pu: d.xq_pu,
        xd_transient_pu: d.xd_transient_pu,
        xq_transient_pu: d.xq_transient_pu,
        xl_pu: d.xl_pu,
        td0_transient_s: d.td0_transient_s,
        tq0_transient_s: d.tq0_transient_s,
        subtransient,
        saturation,
    }
}

fn motor_data(c: &mut Checker<'_>, s: &Site, m: MotorRecord) -> MotorData {
    for (name, v) in [
        ("rs_pu", m.rs_pu),
        ("xs_pu", m.xs_pu),
        ("rr_pu", m.rr_pu),
        ("xr_pu", m.xr_pu),
    ] {
        c.positive(s, &format!("motor.{name}"), v, 1.0);
    }
    c.positive(s, "motor.xm_pu", m.xm_pu, 20.0);
    c.positive(s, "motor.h_s", m.h_s, 10.0);
    c.number(s, "motor.torque_exponent", m.torque_exponent, 0.0, 3.0);
    c.number(s, "motor.loading_factor", m.loading_factor, 0.1, 1.0);
    let under_voltage_trip = m.under_voltage_trip.map(|t| {
        c.number(s, "motor.under_voltage_trip.v_pu", t.v_pu, 0.0, 1.0);
        c.number(s, "motor.under_voltage_trip.delay_s", t.delay_s, 0.0, 100.0);
        UnderVoltageTrip {
            v_pu: t.v_pu,
            delay_s: t.delay_s,
        }
    });
    MotorData {
        rs_pu: m.rs_pu,
        xs_pu: m.xs_pu,
        xm_pu: m.xm_pu,
        rr_pu: m.rr_pu,
        xr_pu: m.xr_pu,
        h_s: m.h_s,
        torque_exponent: m.torque_exponent,
        loading_factor: m.loading_factor,
        under_voltage_trip,
    }
}

fn exciter_data(c: &mut Checker<'_>, s: &Site, e: ExciterRecord) -> ExciterData {
    // Ranges: generous bounds around the typical values of IEEE Std 421.5 sample data (from
    // memory); they catch unit mistakes, not unusual designs.
    match e {
        ExciterRecord::St1a {
            t_measure_s,
            t_lead_s,
            t_lag_s,
            gain,
            t_amplifier_s,
            amplifier_max_pu,
            amplifier_min_pu,
            field_max_pu,
            field_min_pu,
        } => {
            c.number(s, "exciter.t_measure_s", t_measure_s, 0.0, 1.0);
            c.number(s, "exciter.t_lead_s", t_lead_s, 0.0, 100.0);
            c.number(s, "exciter.t_lag_s", t_lag_s, 0.0, 100.0);
            c.positive(s, "exciter.gain", gain, 10_000.0);
            // 0: algebraic amplifier. A lag shorter than 1 ms is stiffer than any step resolves.
            if t_amplifier_s != 0.0 {
                c.number(s, "exciter.t_amplifier_s", t_amplifier_s, 1e-3, 10.0);
            }
            c.number(s, "exciter.field_max_pu", field_max_pu, 0.0, 20.0);
            c.number(s, "exciter.field_min_pu", field_min_pu, -20.0, field_max_pu);
            // The amplifier's range defaults to the bridge's at rated terminal voltage.
            let amplifier_max_pu = amplifier_max_pu.unwrap_or(field_max_pu);
            let amplifier_min_pu = amplifier_min_pu.unwrap_or(field_min_pu);
            c.number(s, "exciter.amplifier_max_pu", amplifier_max_pu, 0.0, 100.0);
            c.number(
                s,
                "exciter.amplifier_min_pu",
                amplifier_min_pu,
                -100.0,
                amplifier_max_pu,
            );
            ExciterData::St1a {
                t_measure_s,
                t_lead_s,
                t_lag_s,
                gain,
                t_amplifier_s,
                amplifier_max_pu,
                amplifier_min_pu,
                field_max_pu,
                field_min_pu,
            }
        }
        ExciterRecord::FirstOrder {
            t_measure_s,
            gain,
            t_s,
            field_max_pu,
            field_min_pu,
        } => {
            c.number(s, "exciter.t_measure_s", t_measure_s, 0.0, 1.0);
            c.positive(s, "exciter.gain", gain, 10_000.0);
            c.number(s, "exciter.t_s", t_s, 1e-3, 10.0);
            c.number(s, "exciter.field_max_pu", field_max_pu, 0.0, 20.0);
            c.number(s, "exciter.field_min_pu", field_min_pu, -20.0, field_max_pu);
            ExciterData::FirstOrder {
                t_measure_s,
                gain,
                t_s,
                field_max_pu,
                field_min_pu,
            }
        }
    }
}

fn stabiliser_data(c: &mut Checker<'_>, s: &Site, p: StabiliserRecord) -> StabiliserData {
    // Ranges: generous bounds around IEEE Std 421.5 sample data (from memory).
    let StabiliserRecord::Pss1a {
        gain,
        t_transducer_s,
        t_washout_s,
        t_lead_1_s,
        t_lag_1_s,
        t_lead_2_s,
        t_lag_2_s,
        output_max_pu,
        output_min_pu,
    } = p;
    c.number(s, "stabiliser.gain", gain, -1000.0, 1000.0);
    c.number(s, "stabiliser.t_transducer_s", t_transducer_s, 0.0, 10.0);
    c.number(s, "stabiliser.t_washout_s", t_washout_s, 0.1, 100.0);
    for (lead, vl, lag, vg) in [
        ("t_lead_1_s", t_lead_1_s, "t_lag_1_s", t_lag_1_s),
        ("t_lead_2_s", t_lead_2_s, "t_lag_2_s", t_lag_2_s),
    ] {
        c.number(s, &format!("stabiliser.{lead}"), vl, 0.0, 100.0);
        c.number(s, &format!("stabiliser.{lag}"), vg, 0.0, 100.0);
        if vl > 0.0 && vg == 0.0 {
            c.report(
                s,
                &format!("stabiliser.{lead}"),
                vl,
                format!("a lead needs its lag: give stabiliser.{lag} too"),
            );
        }
    }
    c.number(s, "stabiliser.output_max_pu", output_max_pu, 0.0, 10.0);
    c.number(
        s,
        "stabiliser.output_min_pu",
        output_min_pu,
        -10.0,
        output_max_pu,
    );
    StabiliserData {
        gain,
        t_transducer_s,
        t_washout_s,
        t_lead_1_s,
        t_lag_1_s,
        t_lead_2_s,
        t_lag_2_s,
        output_max_pu,
        output_min_pu,
    }
}

fn governor_data(c: &mut Checker<'_>, s: &Site, g: GovernorRecord) -> GovernorData {
    c.number(s, "governor.droop_pu", g.droop_pu, 0.01, 0.5);
    c.number(s, "governor.t_valve_s", g.t_valve_s, 1e-3, 10.0);
    c.number(s, "governor.t_reheat_s", g.t_reheat_s, 0.0, 50.0);
    c.number(s, "governor.hp_fraction", g.hp_fraction, 0.0, 1.0);
    c.number(s, "governor.valve_max_pu", g.valve_max_pu, 0.0, 2.0);
    c.number(
        s,
        "governor.valve_min_pu",
        g.valve_min_pu,
        -1.0,
        g.valve_max_pu,
    );
    GovernorData {
        droop_pu: g.droop_pu,
        t_valve_s: g.t_valve_s,
        t_reheat_s: g.t_reheat_s,
        hp_fraction: g.hp_fraction,
        valve_max_pu: g.valve_max_pu,
        valve_min_pu: g.valve_min_pu,
    }
}

/// A ride-through curve named `field`, its voltages within `v_range_pu`.
fn ride_through_curve(
    c: &mut Checker<'_>,
    s: &Site,
    field: &str,
    points: &[RideThroughRecord],
    v_range_pu: (f64, f64),
) -> Vec<RideThroughPoint> {
    points
        .iter()
        .map(|p| {
            let (lo, hi) = v_range_pu;
            c.number(s, &format!("dynamics.{field}.v_pu"), p.v_pu, lo, hi);
            c.number(s, &format!("dynamics.{field}.t_s"), p.t_s, 0.0, 1000.0);
            RideThroughPoint {
                v_pu: p.v_pu,
                t_s: p.t_s,
            }
        })
        .collect()
}

/// A ride-through curve as written: left out when it is the default.
fn curve_record(
    curve: &[RideThroughPoint],
    default: &[RideThroughPoint],
) -> Option<Vec<RideThroughRecord>> {
    (curve != default).then(|| {
        curve
            .iter()
            .map(|p| RideThroughRecord {
                v_pu: p.v_pu,
                t_s: p.t_s,
            })
            .collect()
    })
}

fn finite_or_none(x: f64, scale: f64) -> Option<f64> {
    x.is_finite().then_some(x * scale)
}

pub(super) fn write(grid: &Grid) -> Result<String, Error> {
    let s = grid.s_base_mva;
    let number = |idx: BusIdx| grid.buses[idx.get()].number;
    let out = FileOut {
        format_version: super::CURRENT_VERSION,
        name: &grid.name,
        s_base_mva: s,
        frequency_hz: grid.frequency_hz,
        bus: grid
            .buses
            .iter()
            .map(|b| BusRecord {
                id: b.number,
                name: b.name.clone(),
                base_kv: b.base_kv,
                v_min_pu: b.v_min_pu,
                v_max_pu: b.v_max_pu,
                area: b.area,
                reference: b.is_reference,
                angle_deg: b.angle_set_rad * 180.0 / PI,
                solved_v_pu: b.stored_solution.map(|v| v.v_pu),
                solved_angle_deg: b.stored_solution.map(|v| v.angle_rad * 180.0 / PI),
            })
            .collect(),
        line: grid
            .branches
            .iter()
            .filter(|b| b.kind == BranchKind::Line)
            .map(|b| LineRecord {
                id: b.id.clone(),
                from: number(b.from),
                to: number(b.to),
                r_pu: Some(b.r_pu),
                x_pu: Some(b.x_pu),
                b_pu: (b.b_pu != 0.0).then_some(b.b_pu),
                rating_mva: b.rating_mva,
                emergency_rating_mva: b.emergency_rating_mva,
                in_service: b.in_service,
                ..Default::default()
            })
            .collect(),
        transformer: grid
            .branches
            .iter()
            .filter(|b| b.kind == BranchKind::Transformer)
            .map(|b| TransformerRecord {
                id: b.id.clone(),
                from: number(b.from),
                to: number(b.to),
                r_pu: b.r_pu,
                x_pu: b.x_pu,
                b_pu: b.b_pu,
                z_base_mva: None,
                tap_ratio: b.tap_ratio,
                phase_shift_deg: b.phase_shift_rad * 180.0 / PI,
                rating_mva: b.rating_mva,
                emergency_rating_mva: b.emergency_rating_mva,
                in_service: b.in_service,
            })
            .collect(),
        shunt: grid
            .shunts
            .iter()
            .map(|sh| ShuntRecord {
                id: sh.id.clone(),
                bus: number(sh.bus),
                g_mw: sh.g_pu * s,
                b_mvar: sh.b_pu * s,
                in_service: sh.in_service,
            })
            .collect(),
        load: grid
            .loads
            .iter()
            .map(|l| LoadRecord {
                id: l.id.clone(),
                bus: number(l.bus),
                p_mw: l.p_pu * s,
                q_mvar: l.q_pu * s,
                voltage_dependence: (l.voltage_dependence != VoltageDependence::CONSTANT_POWER)
                    .then_some(VoltageDependenceRecord {
                        p_z: l.voltage_dependence.p_z,
                        p_i: l.voltage_dependence.p_i,
                        p_p: l.voltage_dependence.p_p,
                        q_z: l.voltage_dependence.q_z,
                        q_i: l.voltage_dependence.q_i,
                        q_p: l.voltage_dependence.q_p,
                    }),
                p_per_frequency_pu: l.frequency_dependence.p_pu_per_pu,
                q_per_frequency_pu: l.frequency_dependence.q_pu_per_pu,
                motor_share: l.motor_share,
                motor: (l.motor != MotorData::TYPICAL).then(|| MotorRecord {
                    rs_pu: l.motor.rs_pu,
                    xs_pu: l.motor.xs_pu,
                    xm_pu: l.motor.xm_pu,
                    rr_pu: l.motor.rr_pu,
                    xr_pu: l.motor.xr_pu,
                    h_s: l.motor.h_s,
                    torque_exponent: l.motor.torque_exponent,
                    loading_factor: l.motor.loading_factor,
                    under_voltage_trip: l.motor.under_voltage_trip.map(|t| {
                        UnderVoltageTripRecord {
                            v_pu: t.v_pu,
                            delay_s: t.delay_s,
                        }
                    }),
                }),
                sheddable_fraction: l.sheddable_fraction,
                priority: l.priority,
                in_service: l.in_service,
            })
            .collect(),
        machine: grid
            .machines
            .iter()
            .map(|m| MachineRecord {
                id: m.id.clone(),
                bus: number(m.bus),
                p_mw: m.p_pu * s,
                q_mvar: m.q_pu * s,
                v_set_pu: m.v_set_pu,
                q_min_mvar: finite_or_none(m.q_min_pu, s),
                q_max_mvar: finite_or_none(m.q_max_pu, s),
                p_min_mw: finite_or_none(m.p_min_pu, s),
                p_max_mw: finite_or_none(m.p_max_pu, s),
                rating_mva: m.rating_mva,
                in_service: m.in_service,
                dynamics: m.dynamics.map(|d| MachineDynamicsRecord {
                    h_s: d.h_s,
                    damping_pu: d.damping_pu,
                    ra_pu: d.ra_pu,
                    xd_pu: d.xd_pu,
                    xq_pu: d.xq_pu,
                    xd_transient_pu: d.xd_transient_pu,
                    xq_transient_pu: d.xq_transient_pu,
                    xd_subtransient_pu: d.subtransient.map(|x| x.xd_pu),
                    xq_subtransient_pu: d.subtransient.map(|x| x.xq_pu),
                    xl_pu: d.xl_pu,
                    td0_transient_s: d.td0_transient_s,
                    tq0_transient_s: d.tq0_transient_s,
                    td0_subtransient_s: d.subtransient.map(|x| x.td0_s),
                    tq0_subtransient_s: d.subtransient.map(|x| x.tq0_s),
                    saturation_at_1_0: d.saturation.map(|x| x.at_1_0),
                    saturation_at_1_2: d.saturation.map(|x| x.at_1_2),
                }),
                exciter: m.exciter.map(|e| match e {
                    ExciterData::St1a {
                        t_measure_s,
                        t_lead_s,
                        t_lag_s,
                        gain,
                        t_amplifier_s,
                        amplifier_max_pu,
                        amplifier_min_pu,
                        field_max_pu,
                        field_min_pu,
                    } => ExciterRecord::St1a {
                        t_measure_s,
                        t_lead_s,
                        t_lag_s,
                        gain,
                        t_amplifier_s,
                        amplifier_max_pu: (amplifier_max_pu != field_max_pu)
                            .then_some(amplifier_max_pu),
                        amplifier_min_pu: (amplifier_min_pu != field_min_pu)
                            .then_some(amplifier_min_pu),
                        field_max_pu,
                        field_min_pu,
                    },
                    ExciterData::FirstOrder {
                        t_measure_s,
                        gain,
                        t_s,
                        field_max_pu,
                        field_min_pu,
                    } => ExciterRecord::FirstOrder {
                        t_measure_s,
                        gain,
                        t_s,
                        field_max_pu,
                        field_min_pu,
                    },
                }),
                stabiliser: m.stabiliser.map(|p| StabiliserRecord::Pss1a {
                    gain: p.gain,
                    t_transducer_s: p.t_transducer_s,
                    t_washout_s: p.t_washout_s,
                    t_lead_1_s: p.t_lead_1_s,
                    t_lag_1_s: p.t_lag_1_s,
                    t_lead_2_s: p.t_lead_2_s,
                    t_lag_2_s: p.t_lag_2_s,
                    output_max_pu: p.output_max_pu,
                    output_min_pu: p.output_min_pu,
                }),
                governor: m.governor.map(|g| GovernorRecord {
                    droop_pu: g.droop_pu,
                    t_valve_s: g.t_valve_s,
                    t_reheat_s: g.t_reheat_s,
                    hp_fraction: g.hp_fraction,
                    valve_max_pu: g.valve_max_pu,
                    valve_min_pu: g.valve_min_pu,
                }),
            })
            .collect(),
        wind: grid
            .wind_plants
            .iter()
            .map(|w| WindRecord {
                id: w.id.clone(),
                bus: number(w.bus),
                rating_mw: w.rating_pu * s,
                p_mw: w.p_pu * s,
                q_mvar: w.q_pu * s,
                in_service: w.in_service,
                dynamics: w.dynamics.as_ref().map(|d| WindDynamicsRecord {
                    i_max_pu: d.i_max_pu,
                    k_reactive_current: d.k_reactive_current,
                    v_dip_pu: d.v_dip_pu,
                    t_current_s: d.t_current_s,
                    p_recovery_pu_per_s: d.p_recovery_pu_per_s,
                    ride_through: curve_record(&d.ride_through, &DEFAULT_RIDE_THROUGH),
                    high_voltage_ride_through: curve_record(
                        &d.high_voltage_ride_through,
                        &DEFAULT_HIGH_VOLTAGE_RIDE_THROUGH,
                    ),
                }),
            })
            .collect(),
    };
    toml::to_string(&out).map_err(|e| Error::Serialise(e.to_string()))
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::format::parse_grid;

    const TWO_BUS: &str = r#"
format_version = 1
name = "two buses"
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
id = "L12"
from = 1
to = 2
length_km = 100.0
r_ohm_per_km = 0.05
x_ohm_per_km = 0.488
b_us_per_km = 3.371

[[machine]]
id = "G1"
bus = 1
p_mw = 0.0
v_set_pu = 1.0
rating_mva = 300.0

[[load]]
id = "D2"
bus = 2
p_mw = 80.0
q_mvar = 20.0
"#;

    fn problems(text: &str) -> Vec<Problem> {
        match parse_grid(text, Path::new("t.toml")) {
            Err(Error::Invalid { problems, .. }) => problems,
            other => panic!("expected Invalid, got {other:?}"),
        }
    }

    #[test]
    fn per_km_line_converts_to_per_unit() {
        // 230 kV, 100 MVA: Z_base = 230^2/100 = 529 ohm (DOMAIN.md 1.1, a definition).
        let grid = parse_grid(TWO_BUS, Path::new("t.toml")).unwrap();
        let b = &grid.branches[0];
        assert!((b.r_pu - 5.0 / 529.0).abs() < 1e-12);
        assert!((b.x_pu - 48.8 / 529.0).abs() < 1e-12);
        assert!((b.b_pu - 337.1e-6 * 529.0).abs() < 1e-12);
    }

    #[test]
    fn round_trip_through_writer() {
        let grid = parse_grid(TWO_BUS, Path::new("t.toml")).unwrap();
        let text = write(&grid).unwrap();
        let again = parse_grid(&text, Path::new("again.toml")).unwrap();
        assert_eq!(grid.buses, again.buses);
        assert_eq!(grid.machines, again.machines);
        assert_eq!(grid.loads, again.loads);
        for (a, b) in grid.branches.iter().zip(&again.branches) {
            assert!((a.x_pu - b.x_pu).abs() < 1e-15 && (a.b_pu - b.b_pu).abs() < 1e-15);
        }
    }

    #[test]
    fn every_problem_is_reported_with_line_field_and_value() {
        let text = TWO_BUS
            .replace("to = 2", "to = 7")
            .replace("p_mw = 80.0", "p_mw = nan")
            .replace("id = \"G1\"", "id = \"D2\"");
        let found = problems(&text);
        let dangling = found
            .iter()
            .find(|p| p.field.as_deref() == Some("to"))
            .unwrap();
        assert_eq!(dangling.value.as_deref(), Some("7"));
        assert_eq!(dangling.line, Some(19));
        assert!(dangling.message.contains("no bus"));
        let nan = found
            .iter()
            .find(|p| p.field.as_deref() == Some("p_mw"))
            .unwrap();
        assert_eq!(nan.value.as_deref(), Some("NaN"));
        assert_eq!(nan.line, Some(35));
        // A machine and a load may share an id: ids are unique per kind only.
        assert_eq!(found.len(), 2, "{found:?}");
    }

    #[test]
    fn zero_impedance_and_absurd_values_are_rejected() {
        let text = TWO_BUS
            .replace("x_ohm_per_km = 0.488", "x_ohm_per_km = 0.0")
            .replace("r_ohm_per_km = 0.05", "r_ohm_per_km = 0.0");
        let found = problems(&text);
        assert!(
            found
                .iter()
                .any(|p| p.message.contains("zero series impedance")),
            "{found:?}"
        );
        let text = TWO_BUS.replace("x_ohm_per_km = 0.488", "x_ohm_per_km = 600.0");
        let found = problems(&text);
        assert!(
            found
                .iter()
                .any(|p| p.field.as_deref() == Some("x_ohm_per_km") && p.message.contains("units")),
            "{found:?}"
        );
    }

    #[test]
    fn island_with_generation_needs_a_reference() {
        let text = TWO_BUS.replace("reference = true", "");
        let found = problems(&text);
        assert!(
            found.iter().any(|p| p.message.contains("no reference bus")),
            "{found:?}"
        );
    }

    #[test]
    fn duplicate_bus_and_bad_base() {
        let text = TWO_BUS.replacen("id = 2\nbase_kv = 230.0", "id = 1\nbase_kv = -5.0", 1);
        let found = problems(&text);
        assert!(
            found.iter().any(|p| p.message.contains("duplicate bus id")),
            "{found:?}"
        );
        assert!(
            found.iter().any(|p| p.field.as_deref() == Some("base_kv")),
            "{found:?}"
        );
        let text = TWO_BUS.replace("s_base_mva = 100.0", "s_base_mva = 0.0");
        let found = problems(&text);
        assert!(
            found
                .iter()
                .any(|p| p.field.as_deref() == Some("s_base_mva") && p.line == Some(4)),
            "{found:?}"
        );
    }

    #[test]
    fn unknown_field_is_a_syntax_error_with_position() {
        let text = TWO_BUS.replace(
            "base_kv = 230.0\nreference",
            "base_kv = 230.0\nvoltage_kv = 1.0\nreference",
        );
        match parse_grid(&text, Path::new("t.toml")) {
            Err(Error::Syntax { line, message, .. }) => {
                assert!(message.contains("voltage_kv"), "{message}");
                assert!((7..=11).contains(&line), "line {line}");
            }
            other => panic!("{other:?}"),
        }
    }

    #[test]
    fn unsupported_version_names_supported_ones() {
        let text = TWO_BUS.replace("format_version = 1", "format_version = 9");
        let err = parse_grid(&text, Path::new("t.toml"))
            .unwrap_err()
            .to_string();
        assert!(
            err.contains("format_version 9") && err.contains("[1]"),
            "{err}"
        );
    }
}
