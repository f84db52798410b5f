//! Helpers shared by the integration tests of `holdfast-core`.

#![allow(clippy::unwrap_used, clippy::expect_used, dead_code)] // reason: test helpers, where a panic is the failure report; each test file uses a subset

use std::path::{Path, PathBuf};

use holdfast_core::dynamics::StabilityCriteria;
use holdfast_core::powerflow::{PowerFlowOptions, solve};
use holdfast_core::{Outages, format};

/// A file of the shared test data (`tests/data`).
pub(crate) fn data(name: &str) -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR"))
        .join("../tests/data")
        .join(name)
}

/// Converts the WSCC 9-bus reference file (its own layout) into our grid-file text.
pub(crate) fn wscc9_grid_text(reference: &toml::Value) -> String {
    let mut out = String::from(
        "format_version = 1\nname = \"WSCC 9-bus\"\ns_base_mva = 100.0\nfrequency_hz = 60.0\n",
    );
    for bus in reference["bus"].as_array().unwrap() {
        let id = bus["id"].as_integer().unwrap();
        out += &format!(
            "[[bus]]\nid = {id}\nbase_kv = {}\n",
            bus["base_kv"].as_float().unwrap()
        );
        if bus["kind"].as_str() == Some("slack") {
            out += "reference = true\n";
        }
    }
    for (k, line) in reference["line"].as_array().unwrap().iter().enumerate() {
        out += &format!(
            "[[line]]\nid = \"L{k}\"\nfrom = {}\nto = {}\nr_pu = {}\nx_pu = {}\nb_pu = {}\n",
            line["from"], line["to"], line["r"], line["x"], line["b_total"]
        );
    }
    for (k, t) in reference["transformer"]
        .as_array()
        .unwrap()
        .iter()
        .enumerate()
    {
        out += &format!(
            "[[transformer]]\nid = \"T{k}\"\nfrom = {}\nto = {}\nx_pu = {}\n",
            t["from"], t["to"], t["x"]
        );
    }
    for (k, l) in reference["load"].as_array().unwrap().iter().enumerate() {
        out += &format!(
            "[[load]]\nid = \"D{k}\"\nbus = {}\np_mw = {}\nq_mvar = {}\n",
            l["bus"], l["p_mw"], l["q_mvar"]
        );
    }
    let buses = reference["bus"].as_array().unwrap();
    for g in reference["generator"].as_array().unwrap() {
        let bus = g["bus"].as_integer().unwrap();
        let v_set = buses
            .iter()
            .find(|b| b["id"].as_integer() == Some(bus))
            .unwrap()["v_set"]
            .as_float()
            .unwrap();
        out += &format!(
            "[[machine]]\nid = \"G{bus}\"\nbus = {bus}\np_mw = {}\nv_set_pu = {v_set}\nrating_mva = 100.0\n",
            g["p_mw"]
        );
        // Machine data of Table 2.1 are on the 100 MVA system base, hence rating_mva = 100.
        let m = reference["machine"]
            .as_array()
            .unwrap()
            .iter()
            .find(|m| m["bus"].as_integer() == Some(bus))
            .unwrap();
        out += &format!(
            "[machine.dynamics]\nh_s = {}\ndamping_pu = {}\nxd_pu = {}\nxq_pu = {}\nxd_transient_pu = {}\n\
             xq_transient_pu = {}\nxl_pu = {}\ntd0_transient_s = {}\ntq0_transient_s = {}\n",
            m["h_s"],
            m["damping"],
            m["xd"],
            m["xq"],
            m["xd_prime"],
            m["xq_prime"],
            m["xl"],
            m["td0_prime_s"],
            m["tq0_prime_s"]
        );
    }
    out
}

/// The WSCC 9-bus grid, its reference file and its solved power flow.
pub(crate) fn wscc9() -> (
    toml::Value,
    holdfast_core::Grid,
    holdfast_core::powerflow::PowerFlowSolution,
) {
    let text = std::fs::read_to_string(data("wscc9.toml")).unwrap();
    let reference: toml::Value = toml::from_str(&text).unwrap();
    let grid = format::parse_grid(
        &wscc9_grid_text(&reference),
        Path::new("wscc9-converted.toml"),
    )
    .unwrap();
    let sol = solve(&grid, &Outages::none(), &PowerFlowOptions::default())
        .converged()
        .unwrap();
    (reference, grid, sol)
}

/// A file of the bundled scenarios (`scenarios/`).
pub(crate) fn scenario(name: &str) -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR"))
        .join("../scenarios")
        .join(name)
}

/// The rotor angle of machine `machine` in a recorded run, from `after_s` on, resampled every
/// `dt_s` by linear interpolation (an event time holds two samples; the steps need not be
/// uniform).
pub(crate) fn swing_samples(
    tr: &holdfast_core::dynamics::Trajectory,
    machine: usize,
    after_s: f64,
    dt_s: f64,
) -> Vec<f64> {
    let first = tr.time_s.iter().position(|&t| t > after_s).unwrap();
    let (t, y) = (&tr.time_s[first..], &tr.angle_deg[machine][first..]);
    let end = t[t.len() - 1];
    let mut out = Vec::new();
    let mut k = 0;
    let mut at = t[0];
    while at <= end + 1e-12 {
        while k + 2 < t.len() && t[k + 1] < at {
            k += 1;
        }
        let span = t[k + 1] - t[k];
        let w = if span > 0.0 { (at - t[k]) / span } else { 1.0 };
        out.push(y[k] + w * (y[k + 1] - y[k]));
        at += dt_s;
    }
    out
}

/// Only the rotor-angle and voltage-recovery criteria: the frequency, over-voltage,
/// final-voltage and damping checks off (these tests judge swings, not the policy).
pub(crate) fn angle_only(f0: f64) -> StabilityCriteria {
    StabilityCriteria {
        nadir_hz: 0.0,
        zenith_hz: f64::INFINITY,
        final_band_hz: f64::INFINITY,
        over_voltage_pu: f64::INFINITY,
        sustained_over_voltage_pu: f64::INFINITY,
        final_voltage_min_pu: 0.0,
        final_voltage_max_pu: f64::INFINITY,
        damping_window_s: 0.0,
        ..StabilityCriteria::for_frequency(f0)
    }
}
