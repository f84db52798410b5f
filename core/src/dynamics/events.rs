//! Events of a dynamic scenario and their two text forms: a TOML scenario file and one-line
//! event strings for the command line (both our own syntax, documented in `scenarios/README.md`).

use std::path::Path;

use serde::Deserialize;
use toml::Spanned;

use crate::model::{BranchIdx, BusIdx, Element, Grid, MachineIdx, WindIdx};
use crate::{Error, Problem};

/// Default fault reactance of a "bolted" fault, pu: small but never zero (common practice,
/// DOMAIN.md 6.5).
pub const BOLTED_FAULT_X_PU: f64 = 1e-4;

/// Something that happens to the grid at an instant.
#[derive(Clone, Debug, PartialEq)]
pub enum Event {
    /// A three-phase fault to ground at a bus through `r_pu + j x_pu`.
    Fault {
        /// Faulted bus.
        bus: BusIdx,
        /// Fault resistance, pu.
        r_pu: f64,
        /// Fault reactance, pu.
        x_pu: f64,
    },
    /// The fault at a bus is removed.
    ClearFault {
        /// The bus.
        bus: BusIdx,
    },
    /// A branch opens at both ends.
    TripBranch(BranchIdx),
    /// A synchronous machine is disconnected.
    TripMachine(MachineIdx),
    /// A wind plant is disconnected.
    TripWind(WindIdx),
    /// Demand at a bus changes by `p_pu` (positive: more load), the loads there scaled
    /// together with their reactive power.
    LoadStep {
        /// The bus.
        bus: BusIdx,
        /// Change of active demand at the initial voltage, pu.
        p_pu: f64,
    },
    /// Load shedding: `p_pu` of demand is removed at a bus, with proportional reactive power.
    Shed {
        /// The bus.
        bus: BusIdx,
        /// Active power removed, at the initial voltage, pu.
        p_pu: f64,
    },
}

/// An event at a time.
#[derive(Clone, Debug, PartialEq)]
pub struct TimedEvent {
    /// Time from the start of the run, s.
    pub t_s: f64,
    /// What happens.
    pub event: Event,
}

/// When a contingency happens and how its fault looks: shared by the labelling runs and the
/// advice re-check, so both simulate the same sequence.
#[derive(Clone, Copy, Debug, PartialEq, serde::Serialize, serde::Deserialize)]
pub struct ContingencyTiming {
    /// Time of the fault or trip, s.
    pub event_at_s: f64,
    /// Fault duration until the protection trips the faulted branches, s.
    pub clearing_time_s: f64,
    /// Fault reactance, pu.
    pub fault_x_pu: f64,
}

impl ContingencyTiming {
    /// When a contingency is over: the fault cleared, or the unit tripped, s.
    pub fn settled_at_s(&self, faulted: bool) -> f64 {
        if faulted {
            self.event_at_s + self.clearing_time_s
        } else {
            self.event_at_s
        }
    }
}

/// The events of a contingency: a bolted-through-`fault_x_pu` fault at `fault_bus` cleared by
/// tripping `branches` after the clearing time (or, without a fault, the branches tripped at
/// the event time), and the trip of a machine or wind plant.
pub fn contingency_events(
    timing: &ContingencyTiming,
    fault_bus: Option<BusIdx>,
    branches: &[BranchIdx],
    machine: Option<MachineIdx>,
    wind: Option<WindIdx>,
) -> Vec<TimedEvent> {
    let mut out = Vec::new();
    let clear = timing.settled_at_s(fault_bus.is_some());
    if let Some(bus) = fault_bus {
        out.push(TimedEvent {
            t_s: timing.event_at_s,
            event: Event::Fault {
                bus,
                r_pu: 0.0,
                x_pu: timing.fault_x_pu,
            },
        });
        out.push(TimedEvent {
            t_s: clear,
            event: Event::ClearFault { bus },
        });
    }
    for &b in branches {
        out.push(TimedEvent {
            t_s: clear,
            event: Event::TripBranch(b),
        });
    }
    if let Some(m) = machine {
        out.push(TimedEvent {
            t_s: timing.event_at_s,
            event: Event::TripMachine(m),
        });
    }
    if let Some(w) = wind {
        out.push(TimedEvent {
            t_s: timing.event_at_s,
            event: Event::TripWind(w),
        });
    }
    out
}

/// A named list of timed events.
#[derive(Clone, Debug, Default, PartialEq)]
pub struct Scenario {
    /// Descriptive name.
    pub name: String,
    /// The events, in any order (the engine sorts them by time, keeping ties in order).
    pub events: Vec<TimedEvent>,
}

impl Scenario {
    /// Time of the last fault clearing, if the scenario clears a fault.
    pub fn last_clearing_s(&self) -> Option<f64> {
        self.events
            .iter()
            .filter(|e| matches!(e.event, Event::ClearFault { .. }))
            .map(|e| e.t_s)
            .reduce(f64::max)
    }
}

#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
struct FileIn {
    #[serde(default)]
    name: String,
    #[serde(default)]
    event: Vec<Spanned<EventRecord>>,
}

#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
struct EventRecord {
    at_s: f64,
    action: String,
    #[serde(default)]
    bus: Option<u32>,
    #[serde(default)]
    id: Option<String>,
    #[serde(default)]
    mw: Option<f64>,
    #[serde(default)]
    r_pu: Option<f64>,
    #[serde(default)]
    x_pu: Option<f64>,
}

/// The actions a scenario may name.
pub const ACTIONS: [&str; 5] = ["fault", "clear_fault", "trip", "shed", "load_step"];

/// Reads a scenario file.
pub fn read_scenario(path: &Path, grid: &Grid) -> Result<Scenario, Error> {
    let text = std::fs::read_to_string(path).map_err(|source| Error::Io {
        path: path.to_path_buf(),
        source,
    })?;
    parse_scenario(&text, path, grid)
}

/// Parses a scenario from TOML text (`path` names it in messages).
pub fn parse_scenario(text: &str, path: &Path, grid: &Grid) -> Result<Scenario, Error> {
    let file: FileIn =
        toml::from_str(text).map_err(|e| crate::format::syntax_error(text, path, &e))?;
    let mut problems = Vec::new();
    let mut events = Vec::new();
    for rec in &file.event {
        let line = crate::format::line_col(text, rec.span().start).0;
        let r = rec.get_ref();
        let record = format!("event at {} s", r.at_s);
        let problem = |field: &str, value: &dyn std::fmt::Display, message: &str| {
            Problem::new(Some(line), record.clone(), message).field(field, value)
        };
        if !(r.at_s.is_finite() && r.at_s >= 0.0) {
            problems.push(problem("at_s", &r.at_s, "must be a time >= 0 s"));
            continue;
        }
        let bus = |problems: &mut Vec<Problem>| -> Option<BusIdx> {
            match r.bus {
                None => {
                    problems.push(Problem::new(
                        Some(line),
                        record.clone(),
                        format!("action \"{}\" needs `bus`", r.action),
                    ));
                    None
                }
                Some(n) => grid.bus_idx(n).or_else(|| {
                    problems.push(problem("bus", &n, "no bus has this number"));
                    None
                }),
            }
        };
        let mw = |problems: &mut Vec<Problem>| -> Option<f64> {
            match r.mw {
                Some(v) if v.is_finite() => Some(v / grid.s_base_mva),
                Some(v) => {
                    problems.push(problem("mw", &v, "must be a finite number"));
                    None
                }
                None => {
                    problems.push(Problem::new(
                        Some(line),
                        record.clone(),
                        format!("action \"{}\" needs `mw`", r.action),
                    ));
                    None
                }
            }
        };
        let event = match r.action.as_str() {
            "fault" => {
                let (rf, xf) = (r.r_pu.unwrap_or(0.0), r.x_pu.unwrap_or(BOLTED_FAULT_X_PU));
                if !(rf >= 0.0 && xf >= 0.0 && rf + xf > 0.0 && (rf + xf).is_finite()) {
                    problems.push(problem(
                        "x_pu",
                        &format!("{xf} (r_pu = {rf})"),
                        "fault impedance must be finite, non-negative and not zero",
                    ));
                    None
                } else {
                    bus(&mut problems).map(|bus| Event::Fault {
                        bus,
                        r_pu: rf,
                        x_pu: xf,
                    })
                }
            }
            "clear_fault" => bus(&mut problems).map(|bus| Event::ClearFault { bus }),
            "trip" => match &r.id {
                None => {
                    problems.push(Problem::new(
                        Some(line),
                        record.clone(),
                        "action \"trip\" needs `id`",
                    ));
                    None
                }
                Some(id) => match trip_event(grid, id) {
                    Some(e) => Some(e),
                    None => {
                        problems.push(problem(
                            "id",
                            &format!("\"{id}\""),
                            "no branch, machine or wind plant has this id",
                        ));
                        None
                    }
                },
            },
            "shed" | "load_step" => {
                let (b, p) = (bus(&mut problems), mw(&mut problems));
                match (b, p) {
                    (Some(bus), Some(p_pu)) if r.action == "shed" => {
                        if p_pu < 0.0 {
                            problems.push(problem("mw", &r.mw.unwrap_or(0.0), "must be >= 0"));
                            None
                        } else {
                            Some(Event::Shed { bus, p_pu })
                        }
                    }
                    (Some(bus), Some(p_pu)) => Some(Event::LoadStep { bus, p_pu }),
                    _ => None,
                }
            }
            other => {
                problems.push(problem(
                    "action",
                    &format!("\"{other}\""),
                    &format!("unknown action; use one of {}", ACTIONS.join(", ")),
                ));
                None
            }
        };
        if let Some(event) = event {
            events.push(TimedEvent { t_s: r.at_s, event });
        }
    }
    if problems.is_empty() {
        Ok(Scenario {
            name: file.name,
            events,
        })
    } else {
        Err(Error::Invalid {
            path: path.to_path_buf(),
            problems,
        })
    }
}

fn trip_event(grid: &Grid, id: &str) -> Option<Event> {
    Some(match grid.element(id)? {
        Element::Branch(k) => Event::TripBranch(k),
        Element::Machine(k) => Event::TripMachine(k),
        Element::Wind(k) => Event::TripWind(k),
    })
}

/// Parses a one-line event: `TIME ACTION ARGS`, with actions
/// `fault BUS [x=X_PU] [r=R_PU]`, `clear BUS`, `trip ID` (the rest of the line, quotes
/// optional), `shed BUS MW`, `load BUS MW`.
/// Errors name the offending word.
pub fn parse_event_line(grid: &Grid, line: &str) -> Result<TimedEvent, String> {
    let words: Vec<&str> = line.split_whitespace().collect();
    let usage = "expected `TIME fault BUS [x=X_PU] [r=R_PU]`, `TIME clear BUS`, `TIME trip ID`, \
                 `TIME shed BUS MW` or `TIME load BUS MW`";
    if words.len() < 3 {
        return Err(format!("event \"{line}\": {usage}"));
    }
    let number = |w: &str, what: &str| -> Result<f64, String> {
        w.parse::<f64>()
            .ok()
            .filter(|v| v.is_finite())
            .ok_or_else(|| format!("event \"{line}\": {what} \"{w}\" is not a number"))
    };
    let bus = |w: &str| -> Result<BusIdx, String> {
        w.parse::<u32>()
            .ok()
            .and_then(|n| grid.bus_idx(n))
            .ok_or_else(|| format!("event \"{line}\": no bus has the number \"{w}\""))
    };
    let t_s = number(words[0], "time")?;
    if t_s < 0.0 {
        return Err(format!("event \"{line}\": time must be >= 0 s"));
    }
    let event = match (words[1], &words[2..]) {
        ("fault", [b, opts @ ..]) => {
            let (mut r_pu, mut x_pu) = (0.0, BOLTED_FAULT_X_PU);
            for o in opts {
                match o.split_once('=') {
                    Some(("x", v)) => x_pu = number(v, "fault reactance")?,
                    Some(("r", v)) => r_pu = number(v, "fault resistance")?,
                    _ => return Err(format!("event \"{line}\": unknown fault option \"{o}\"")),
                }
            }
            if !(r_pu >= 0.0 && x_pu >= 0.0 && r_pu + x_pu > 0.0) {
                return Err(format!(
                    "event \"{line}\": fault impedance must be non-negative and not zero"
                ));
            }
            Event::Fault {
                bus: bus(b)?,
                r_pu,
                x_pu,
            }
        }
        ("clear", [b]) => Event::ClearFault { bus: bus(b)? },
        ("trip", words) => {
            // The id is the rest of the line (ids may hold spaces), quotes optional.
            let id = words.join(" ");
            let id = id.trim_matches('"');
            trip_event(grid, id).ok_or_else(|| {
                format!("event \"{line}\": no branch, machine or wind plant has the id \"{id}\"")
            })?
        }
        ("shed", [b, mw]) => {
            let p = number(mw, "amount")?;
            if p < 0.0 {
                return Err(format!("event \"{line}\": shed amount must be >= 0 MW"));
            }
            Event::Shed {
                bus: bus(b)?,
                p_pu: p / grid.s_base_mva,
            }
        }
        ("load", [b, mw]) => Event::LoadStep {
            bus: bus(b)?,
            p_pu: number(mw, "amount")? / grid.s_base_mva,
        },
        _ => return Err(format!("event \"{line}\": {usage}")),
    };
    Ok(TimedEvent { t_s, event })
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::format::parse_grid;

    const GRID: &str = r#"
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
id = "the line"
from = 1
to = 2
x_pu = 0.1
[[machine]]
id = "G"
bus = 1
p_mw = 0.0
v_set_pu = 1.0
rating_mva = 200.0
[[load]]
id = "D"
bus = 2
p_mw = 50.0
"#;

    fn grid() -> Grid {
        parse_grid(GRID, Path::new("g.toml")).unwrap()
    }

    #[test]
    fn scenario_file_and_event_lines_give_the_same_events() {
        let g = grid();
        let text = r#"
name = "s"
[[event]]
at_s = 0.1
action = "fault"
bus = 2
[[event]]
at_s = 0.2
action = "clear_fault"
bus = 2
[[event]]
at_s = 0.2
action = "trip"
id = "the line"
[[event]]
at_s = 0.5
action = "shed"
bus = 2
mw = 10.0
"#;
        let s = parse_scenario(text, Path::new("s.toml"), &g).unwrap();
        let lines = [
            "0.1 fault 2",
            "0.2 clear 2",
            "0.2 trip the line",
            "0.5 shed 2 10",
        ];
        let parsed: Vec<TimedEvent> = lines
            .iter()
            .map(|l| parse_event_line(&g, l).unwrap())
            .collect();
        assert_eq!(s.events, parsed);
        assert_eq!(s.last_clearing_s(), Some(0.2));
    }

    #[test]
    fn scenario_errors_name_line_field_and_value() {
        let g = grid();
        let text = "name = \"bad\"\n[[event]]\nat_s = 0.1\naction = \"fault\"\nbus = 7\n\
                    [[event]]\nat_s = 0.2\naction = \"explode\"\n";
        let Err(Error::Invalid { path, problems }) = parse_scenario(text, Path::new("s.toml"), &g)
        else {
            panic!("expected a list of problems");
        };
        assert_eq!(path, Path::new("s.toml"));
        assert_eq!(problems.len(), 2);
        assert_eq!(problems[0].line, Some(2));
        assert_eq!(problems[0].field.as_deref(), Some("bus"));
        assert_eq!(problems[0].value.as_deref(), Some("7"));
        assert_eq!(problems[1].field.as_deref(), Some("action"));
        assert!(
            problems[1].message.contains("clear_fault"),
            "{}",
            problems[1]
        );
        // Syntax errors carry the position.
        let e = parse_scenario("[[event]]\nat_s = \n", Path::new("s.toml"), &g).unwrap_err();
        assert!(matches!(e, Error::Syntax { line: 2, .. }), "{e}");
        // One-line events name the offending word.
        let e = parse_event_line(&g, "0.1 shed 2 lots").unwrap_err();
        assert!(e.contains("\"lots\""), "{e}");
        assert!(parse_event_line(&g, "0.1 trip nothing").is_err());
        assert!(parse_event_line(&g, "-1 clear 2").is_err());
    }
}
