//! Import of the IEEE Common Data Format (IEEE Working Group, "Common Format for Exchange of
//! Solved Load Flow Data", IEEE Trans. PAS-92(6), 1973), including the solved voltages it
//! carries, so tests can compare a solve against the published solution.
//!
//! Reading follows the robust recipe in `shared/reference/CDF_FORMAT.md`: bus cards are read by
//! position for the number (columns 1-4) and name (columns 6-17), then split on whitespace;
//! branch cards are split on whitespace. Section item counts are ignored; cards are counted up
//! to each section's terminator. Loss-zone, interchange and tie-line sections are skipped.
//!
//! Mapping into the model:
//! - a bus of type 2 or 3 gets a machine (`gen <bus>`) holding the desired voltage within the
//!   card's reactive limits (both limits zero means unlimited); a type-3 bus is the reference;
//! - generation at a bus of type 0 or 1 becomes a machine with fixed P and Q;
//! - load becomes a constant-power load (`load <bus>`); shunt G and B a shunt (`shunt <bus>`);
//! - a branch is a transformer if its type is not 0, its turns ratio is not 0 or 1, it has a
//!   phase shift, or it joins buses of different base voltage; otherwise a line;
//! - the format carries no machine rating: each machine is given the system base as rating,
//!   which only weights how reactive power is shared at a bus with several machines;
//! - a base voltage of 0 (as in the archive's 14-bus file) is replaced by 1 kV with a warning;
//!   per-unit results do not depend on it.

use std::collections::{HashMap, HashSet};
use std::path::Path;

use crate::model::*;
use crate::{Error, Problem};

/// A grid imported from a CDF file, with notes on what the importer had to assume.
#[derive(Clone, Debug)]
pub struct CdfImport {
    /// The imported grid; each bus carries the file's solved voltage in `stored_solution`.
    pub grid: Grid,
    /// The case's title card, trimmed.
    pub title: String,
    /// Things the importer assumed or replaced, one sentence each.
    pub warnings: Vec<String>,
}

/// Reads a CDF file.
pub fn load_cdf(path: &Path) -> Result<CdfImport, Error> {
    let bytes = std::fs::read(path).map_err(|source| Error::Io {
        path: path.to_path_buf(),
        source,
    })?;
    let text = String::from_utf8_lossy(&bytes);
    parse_cdf(&text, path)
}

struct BusCard {
    line: usize,
    number: u32,
    name: String,
    area: u32,
    kind: u32,
    v: f64,
    angle_deg: f64,
    pl: f64,
    ql: f64,
    pg: f64,
    qg: f64,
    base_kv: f64,
    v_set: f64,
    q_max: f64,
    q_min: f64,
    g: f64,
    b: f64,
}

struct BranchCard {
    line: usize,
    tap_bus: u32,
    z_bus: u32,
    circuit: u32,
    kind: u32,
    r: f64,
    x: f64,
    b: f64,
    rating1: f64,
    rating2: f64,
    ratio: f64,
    angle_deg: f64,
}

const BUS_FIELDS: [&str; 16] = [
    "area",
    "loss zone",
    "type",
    "final voltage",
    "final angle",
    "load MW",
    "load MVAr",
    "generation MW",
    "generation MVAr",
    "base kV",
    "desired voltage",
    "max MVAr",
    "min MVAr",
    "shunt G",
    "shunt B",
    "remote bus",
];
const BRANCH_FIELDS: [&str; 16] = [
    "tap bus",
    "Z bus",
    "area",
    "loss zone",
    "circuit",
    "type",
    "R",
    "X",
    "B",
    "rating 1",
    "rating 2",
    "rating 3",
    "control bus",
    "side",
    "turns ratio",
    "phase angle",
];

/// Parses CDF text; `path` is used only in messages.
pub fn parse_cdf(text: &str, path: &Path) -> Result<CdfImport, Error> {
    let err = |line: usize, message: String| Error::Cdf {
        path: path.to_path_buf(),
        line,
        message,
    };
    let lines: Vec<&str> = text.lines().map(|l| l.trim_end_matches('\r')).collect();
    let title = lines.first().copied().unwrap_or("");
    let base_field = title.get(31..37).unwrap_or("").trim();
    let s_base_mva: f64 = base_field.parse().map_err(|_| {
        err(
            1,
            format!(
                "title card: field `MVA base` (columns 32-37) = {base_field:?} is not a number"
            ),
        )
    })?;
    if !(s_base_mva.is_finite() && s_base_mva > 0.0) {
        return Err(err(
            1,
            format!("title card: field `MVA base` = {s_base_mva} must be positive"),
        ));
    }

    let mut buses = Vec::new();
    let mut branches = Vec::new();
    let mut pos = 1;
    let mut saw_bus = false;
    let mut stray = Vec::new();
    while pos < lines.len() {
        let header = lines[pos];
        let word = header.split_whitespace().next().unwrap_or("");
        pos += 1;
        match word {
            "BUS" => {
                saw_bus = true;
                while pos < lines.len() && !is_terminator(lines[pos]) {
                    buses.push(parse_bus(lines[pos], pos + 1).map_err(|m| err(pos + 1, m))?);
                    pos += 1;
                }
                pos += 1;
            }
            "BRANCH" => {
                while pos < lines.len() && !is_terminator(lines[pos]) {
                    branches.push(parse_branch(lines[pos], pos + 1).map_err(|m| err(pos + 1, m))?);
                    pos += 1;
                }
                pos += 1;
            }
            "LOSS" | "INTERCHANGE" | "TIE" => {
                while pos < lines.len() && !is_terminator(lines[pos]) {
                    pos += 1;
                }
                pos += 1;
            }
            "END" => break,
            "" => {}
            _ if is_terminator(header) => {}
            _ => {
                // A stray card between sections (the archive's 30-bus file has its interchange
                // card after the terminator); the sections Holdfast reads are never affected.
                stray.push(pos);
            }
        }
    }
    if !saw_bus || buses.is_empty() {
        return Err(err(lines.len().max(1), "no bus data found".to_string()));
    }
    let mut import = build(path, title.to_string(), s_base_mva, buses, branches)?;
    if !stray.is_empty() {
        let list: Vec<String> = stray.iter().map(usize::to_string).collect();
        import.warnings.push(format!(
            "skipped card(s) outside any section at line(s) {}",
            list.join(", ")
        ));
    }
    Ok(import)
}

fn is_terminator(line: &str) -> bool {
    line.trim_start().starts_with("-9")
}

fn number<T: std::str::FromStr>(token: &str, field: &str) -> Result<T, String> {
    token
        .parse::<T>()
        .map_err(|_| format!("field `{field}` = {token:?} is not a valid number"))
}

fn finite(x: f64, field: &str) -> Result<f64, String> {
    if x.is_finite() {
        Ok(x)
    } else {
        Err(format!("field `{field}` = {x} must be finite"))
    }
}

fn parse_bus(card: &str, line: usize) -> Result<BusCard, String> {
    let num_text = card.get(0..4).unwrap_or(card).trim();
    let number_value: u32 = number(num_text, "bus number")?;
    let name = card.get(5..17).unwrap_or("").trim().to_string();
    let rest = card.get(17..).unwrap_or("");
    let tokens: Vec<&str> = rest.split_whitespace().collect();
    if tokens.len() < 15 {
        return Err(format!(
            "bus card has {} fields after the name, expected 16 ({})",
            tokens.len(),
            BUS_FIELDS.join(", ")
        ));
    }
    let f = |i: usize| -> Result<f64, String> {
        finite(number::<f64>(tokens[i], BUS_FIELDS[i])?, BUS_FIELDS[i])
    };
    let kind: u32 = number(tokens[2], BUS_FIELDS[2])?;
    if kind > 3 {
        return Err(format!("field `type` = {kind} is not 0, 1, 2 or 3"));
    }
    Ok(BusCard {
        line,
        number: number_value,
        name,
        area: number(tokens[0], BUS_FIELDS[0])?,
        kind,
        v: f(3)?,
        angle_deg: f(4)?,
        pl: f(5)?,
        ql: f(6)?,
        pg: f(7)?,
        qg: f(8)?,
        base_kv: f(9)?,
        v_set: f(10)?,
        q_max: f(11)?,
        q_min: f(12)?,
        g: f(13)?,
        b: f(14)?,
    })
}

fn parse_branch(card: &str, line: usize) -> Result<BranchCard, String> {
    let tokens: Vec<&str> = card.split_whitespace().collect();
    if tokens.len() < 16 {
        return Err(format!(
            "branch card has {} fields, expected at least 16 ({})",
            tokens.len(),
            BRANCH_FIELDS.join(", ")
        ));
    }
    let f = |i: usize| -> Result<f64, String> {
        finite(
            number::<f64>(tokens[i], BRANCH_FIELDS[i])?,
            BRANCH_FIELDS[i],
        )
    };
    Ok(BranchCard {
        line,
        tap_bus: number(tokens[0], BRANCH_FIELDS[0])?,
        z_bus: number(tokens[1], BRANCH_FIELDS[1])?,
        circuit: number(tokens[4], BRANCH_FIELDS[4])?,
        kind: number(tokens[5], BRANCH_FIELDS[5])?,
        r: f(6)?,
        x: f(7)?,
        b: f(8)?,
        rating1: f(9)?,
        rating2: f(10)?,
        ratio: f(14)?,
        angle_deg: f(15)?,
    })
}

fn build(
    path: &Path,
    title: String,
    s_base: f64,
    cards: Vec<BusCard>,
    branch_cards: Vec<BranchCard>,
) -> Result<CdfImport, Error> {
    let mut problems = Vec::new();
    let mut warnings = Vec::new();
    let mut lookup = HashMap::new();
    let mut buses = Vec::new();
    let mut loads = Vec::new();
    let mut shunts = Vec::new();
    let mut machines = Vec::new();
    let mut zero_kv = Vec::new();
    for card in &cards {
        if lookup
            .insert(card.number, BusIdx(buses.len() as u32))
            .is_some()
        {
            problems.push(Problem::new(
                Some(card.line),
                format!("bus {}", card.number),
                "duplicate bus number",
            ));
        }
        let base_kv = if card.base_kv > 0.0 {
            card.base_kv
        } else {
            zero_kv.push(card.number.to_string());
            1.0
        };
        let idx = BusIdx(buses.len() as u32);
        buses.push(Bus {
            number: card.number,
            name: card.name.clone(),
            base_kv,
            v_min_pu: 0.9,
            v_max_pu: 1.1,
            area: card.area,
            is_reference: card.kind == 3,
            angle_set_rad: if card.kind == 3 {
                card.angle_deg.to_radians()
            } else {
                0.0
            },
            stored_solution: Some(StoredVoltage {
                v_pu: card.v,
                angle_rad: card.angle_deg.to_radians(),
            }),
        });
        if card.pl != 0.0 || card.ql != 0.0 {
            loads.push(Load {
                id: format!("load {}", card.number),
                bus: idx,
                p_pu: card.pl / s_base,
                q_pu: card.ql / s_base,
                voltage_dependence: VoltageDependence::CONSTANT_POWER,
                frequency_dependence: FrequencyDependence::default(),
                motor_share: 0.0,
                motor: MotorData::TYPICAL,
                sheddable_fraction: 0.0,
                priority: 0,
                in_service: true,
            });
        }
        if card.g != 0.0 || card.b != 0.0 {
            shunts.push(Shunt {
                id: format!("shunt {}", card.number),
                bus: idx,
                g_pu: card.g,
                b_pu: card.b,
                in_service: true,
            });
        }
        let regulates = card.kind >= 2;
        if regulates || card.pg != 0.0 || card.qg != 0.0 {
            if regulates && !(0.5..=1.5).contains(&card.v_set) {
                problems.push(
                    Problem::new(
                        Some(card.line),
                        format!("bus {}", card.number),
                        "desired voltage outside 0.5-1.5 pu",
                    )
                    .field("desired voltage", card.v_set),
                );
            }
            let unlimited = card.q_max == 0.0 && card.q_min == 0.0;
            if regulates && !unlimited && card.q_min > card.q_max {
                problems.push(
                    Problem::new(
                        Some(card.line),
                        format!("bus {}", card.number),
                        "min MVAr exceeds max MVAr",
                    )
                    .field("min MVAr", card.q_min),
                );
            }
            machines.push(SyncMachine {
                id: format!("gen {}", card.number),
                bus: idx,
                p_pu: card.pg / s_base,
                q_pu: card.qg / s_base,
                v_set_pu: regulates.then_some(card.v_set),
                q_min_pu: if unlimited {
                    f64::NEG_INFINITY
                } else {
                    card.q_min / s_base
                },
                q_max_pu: if unlimited {
                    f64::INFINITY
                } else {
                    card.q_max / s_base
                },
                p_min_pu: f64::NEG_INFINITY,
                p_max_pu: f64::INFINITY,
                rating_mva: s_base,
                dynamics: None,
                exciter: None,
                stabiliser: None,
                governor: None,
                in_service: true,
            });
        }
    }
    if !zero_kv.is_empty() {
        warnings.push(format!(
            "base kV is 0 in the file for bus(es) {}; set to 1 kV (per-unit results do not depend on it)",
            zero_kv.join(", ")
        ));
    }

    let mut branches = Vec::new();
    let mut ids = HashSet::new();
    for card in &branch_cards {
        let record = format!("branch {}-{}", card.tap_bus, card.z_bus);
        let from = lookup.get(&card.tap_bus).copied();
        let to = lookup.get(&card.z_bus).copied();
        if from.is_none() {
            problems.push(
                Problem::new(Some(card.line), &record, "no bus with this number")
                    .field("tap bus", card.tap_bus),
            );
        }
        if to.is_none() {
            problems.push(
                Problem::new(Some(card.line), &record, "no bus with this number")
                    .field("Z bus", card.z_bus),
            );
        }
        let (Some(from), Some(to)) = (from, to) else {
            continue;
        };
        if card.r.hypot(card.x) < 1e-9 {
            problems.push(
                Problem::new(Some(card.line), &record, "zero series impedance").field("X", card.x),
            );
        }
        if card.tap_bus == card.z_bus {
            problems.push(Problem::new(
                Some(card.line),
                &record,
                "a branch must join two different buses",
            ));
        }
        let ratio = if card.ratio == 0.0 { 1.0 } else { card.ratio };
        if !(0.5..=2.0).contains(&ratio) {
            problems.push(
                Problem::new(Some(card.line), &record, "turns ratio outside 0.5-2.0")
                    .field("turns ratio", card.ratio),
            );
        }
        let different_kv = (buses[from.get()].base_kv - buses[to.get()].base_kv).abs() > 1e-9;
        let is_transformer =
            card.kind != 0 || ratio != 1.0 || card.angle_deg != 0.0 || different_kv;
        let mut id = format!("{}-{}", card.tap_bus, card.z_bus);
        if card.circuit > 1 || ids.contains(&id) {
            id = format!("{id} #{}", card.circuit.max(2));
        }
        let mut n = 2;
        while ids.contains(&id) {
            n += 1;
            id = format!("{}-{} #{n}", card.tap_bus, card.z_bus);
        }
        ids.insert(id.clone());
        branches.push(Branch {
            id,
            kind: if is_transformer {
                BranchKind::Transformer
            } else {
                BranchKind::Line
            },
            from,
            to,
            r_pu: card.r,
            x_pu: card.x,
            b_pu: card.b,
            tap_ratio: ratio,
            phase_shift_rad: card.angle_deg.to_radians(),
            rating_mva: card.rating1.max(0.0),
            emergency_rating_mva: card.rating2.max(0.0),
            in_service: true,
        });
    }
    if !problems.is_empty() {
        return Err(Error::Invalid {
            path: path.to_path_buf(),
            problems,
        });
    }
    let name = case_name(&title);
    let grid = Grid::assemble(
        name,
        s_base,
        60.0,
        buses,
        branches,
        shunts,
        loads,
        machines,
        Vec::new(),
    );
    let reference_problems = crate::topology::check_references(&grid);
    if !reference_problems.is_empty() {
        return Err(Error::Invalid {
            path: path.to_path_buf(),
            problems: reference_problems
                .into_iter()
                .map(|p| {
                    let line = p.bus.map(|b| cards[b.get()].line);
                    Problem::new(line, p.record, p.message)
                })
                .collect(),
        });
    }
    warnings.push("the format gives no nominal frequency; 60 Hz assumed".to_string());
    Ok(CdfImport {
        grid,
        title: title.trim().to_string(),
        warnings,
    })
}

/// The case identification (title card columns 46-73), or the whole card if that is blank.
fn case_name(title: &str) -> String {
    title
        .get(45..)
        .map(str::trim)
        .filter(|s| !s.is_empty())
        .unwrap_or(title.trim())
        .to_string()
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn bad_number_names_line_field_and_value() {
        let text = " 08/19/93 UW ARCHIVE           100.0  1962 W test\n\
BUS DATA FOLLOWS                            1 ITEMS\n   \
1 Bus 1     HV  1  1  3 1.06x    0.0      0.0      0.0    232.4   -16.9     0.0  1.060     0.0     0.0   0.0    0.0        0\n\
-999\nEND OF DATA\n";
        let err = parse_cdf(text, Path::new("x.cdf")).unwrap_err().to_string();
        assert!(
            err.contains("x.cdf:3") && err.contains("final voltage") && err.contains("1.06x"),
            "{err}"
        );
    }

    #[test]
    fn case_name_comes_from_columns_46_to_73() {
        // Title card of the UW archive's 14-bus file.
        let title = " 08/19/93 UW ARCHIVE           100.0  1962 W IEEE 14 Bus Test Case";
        assert_eq!(case_name(title), "IEEE 14 Bus Test Case");
    }

    #[test]
    fn bad_base_is_reported() {
        let err = parse_cdf(" 08/19/93 UW ARCHIVE           abc\n", Path::new("x.cdf"))
            .unwrap_err()
            .to_string();
        assert!(err.contains("x.cdf:1") && err.contains("MVA base"), "{err}");
    }
}
