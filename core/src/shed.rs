//! Where a total shed amount goes: the candidate buses with their shed-able load and the three
//! placement rules. Shared by the labelling (`holdfast-sim`) and the advice re-check
//! (`holdfast-infer`), so both spread a total the same way.

use crate::BusIdx;
use crate::topology::DistanceMatrix;

/// A bus that may shed, with how much, pu.
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct Candidate {
    /// The bus.
    pub bus: BusIdx,
    /// Shed-able active load there, pu (sum over its in-service loads).
    pub sheddable_pu: f64,
}

/// How a total shed amount is spread over the candidate buses.
#[derive(Clone, Copy, Debug, PartialEq, Eq, serde::Serialize, serde::Deserialize)]
pub enum Placement {
    /// Every candidate sheds the same share of its shed-able load.
    Uniform,
    /// Shares weighted by shed-able load over electrical distance to the disturbance.
    DistanceWeighted,
    /// The electrically nearest candidates shed all they can first.
    NearestFirst,
}

impl Placement {
    /// The name used in study files.
    pub fn name(self) -> &'static str {
        match self {
            Placement::Uniform => "uniform",
            Placement::DistanceWeighted => "distance_weighted",
            Placement::NearestFirst => "nearest_first",
        }
    }
}

/// Distances below this are raised to it when weighting (the disturbance's own bus would
/// otherwise take everything), pu.
pub const DISTANCE_FLOOR_PU: f64 = 0.01;

/// Spreads `total_pu` (at most the candidates' sum) over the candidates by the placement rule;
/// returns the amount per candidate, pu, never above its shed-able load.
pub fn place(
    cands: &[Candidate],
    total_pu: f64,
    placement: Placement,
    disturbance: BusIdx,
    distance: &DistanceMatrix,
) -> Vec<f64> {
    let available: f64 = cands.iter().map(|c| c.sheddable_pu).sum();
    let total = total_pu.clamp(0.0, available);
    let mut out = vec![0.0; cands.len()];
    if total <= 0.0 {
        return out;
    }
    let d = |c: &Candidate| {
        let x = distance.get(c.bus, disturbance);
        if x.is_finite() {
            x.max(DISTANCE_FLOOR_PU)
        } else {
            f64::INFINITY
        }
    };
    match placement {
        Placement::Uniform => {
            let share = total / available;
            for (o, c) in out.iter_mut().zip(cands) {
                *o = share * c.sheddable_pu;
            }
        }
        Placement::DistanceWeighted => {
            let weights: Vec<f64> = cands.iter().map(|c| c.sheddable_pu / d(c)).collect();
            water_fill(cands, &weights, total, &mut out);
        }
        Placement::NearestFirst => {
            let mut order: Vec<usize> = (0..cands.len()).collect();
            order.sort_by(|&a, &b| d(&cands[a]).total_cmp(&d(&cands[b])).then(a.cmp(&b)));
            let mut left = total;
            for k in order {
                let take = left.min(cands[k].sheddable_pu);
                out[k] = take;
                left -= take;
                if left <= 0.0 {
                    break;
                }
            }
        }
    }
    out
}

/// Shares `total` in proportion to `weights`, capping each candidate at its shed-able load and
/// handing what a cap leaves to the rest, until all is placed.
fn water_fill(cands: &[Candidate], weights: &[f64], total: f64, out: &mut [f64]) {
    let mut open: Vec<usize> = (0..cands.len()).filter(|&k| weights[k] > 0.0).collect();
    let mut left = total;
    while left > 1e-12 && !open.is_empty() {
        let sum: f64 = open.iter().map(|&k| weights[k]).sum();
        let mut capped = false;
        let mut next = Vec::with_capacity(open.len());
        let mut placed = 0.0;
        for &k in &open {
            let want = left * weights[k] / sum;
            let room = cands[k].sheddable_pu - out[k];
            if want >= room {
                out[k] += room;
                placed += room;
                capped = true;
            } else {
                next.push(k);
            }
        }
        if !capped {
            for &k in &open {
                out[k] += left * weights[k] / sum;
            }
            return;
        }
        left -= placed;
        open = next;
    }
    // Candidates with zero weight (infinitely far) take what is left, evenly by shed-able load.
    if left > 1e-12 {
        let rest: Vec<usize> = (0..cands.len())
            .filter(|&k| cands[k].sheddable_pu - out[k] > 0.0)
            .collect();
        let room: f64 = rest.iter().map(|&k| cands[k].sheddable_pu - out[k]).sum();
        for &k in &rest {
            out[k] += left * (cands[k].sheddable_pu - out[k]) / room;
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn line_distances(n: usize) -> DistanceMatrix {
        // Buses on a line, 0.1 pu apart.
        let mut values_pu = vec![0.0; n * n];
        for i in 0..n {
            for j in 0..n {
                values_pu[i * n + j] = 0.1 * (i as f64 - j as f64).abs();
            }
        }
        DistanceMatrix { n, values_pu }
    }

    fn cands(amounts: &[f64]) -> Vec<Candidate> {
        amounts
            .iter()
            .enumerate()
            .map(|(k, &s)| Candidate {
                bus: BusIdx(k as u32),
                sheddable_pu: s,
            })
            .collect()
    }

    #[test]
    fn every_rule_places_the_whole_amount_within_the_caps() {
        let c = cands(&[0.5, 1.0, 0.2, 0.8]);
        let d = line_distances(4);
        for rule in [
            Placement::Uniform,
            Placement::DistanceWeighted,
            Placement::NearestFirst,
        ] {
            for total in [0.0, 0.3, 1.7, 2.5, 9.0] {
                let out = place(&c, total, rule, BusIdx(2), &d);
                let sum: f64 = out.iter().sum();
                assert!(
                    (sum - total.min(2.5)).abs() < 1e-12,
                    "{rule:?} {total}: {out:?}"
                );
                for (o, c) in out.iter().zip(&c) {
                    assert!(
                        *o >= 0.0 && *o <= c.sheddable_pu + 1e-12,
                        "{rule:?}: {out:?}"
                    );
                }
            }
        }
    }

    #[test]
    fn rules_differ_as_documented() {
        let c = cands(&[1.0, 1.0, 1.0, 1.0]);
        let d = line_distances(4);
        // Uniform: equal shares.
        assert_eq!(
            place(&c, 2.0, Placement::Uniform, BusIdx(0), &d),
            vec![0.5; 4]
        );
        // Nearest first: bus 0 (the disturbance), then bus 1.
        assert_eq!(
            place(&c, 1.5, Placement::NearestFirst, BusIdx(0), &d),
            vec![1.0, 0.5, 0.0, 0.0]
        );
        // Distance weighted from bus 3: weights 1/0.3, 1/0.2, 1/0.1, 1/0.01; bus 3 caps at 1.0
        // and the remaining 0.2 splits 2:3:6 over buses 0, 1, 2.
        let out = place(&c, 1.2, Placement::DistanceWeighted, BusIdx(3), &d);
        let expect = [0.2 * 2.0 / 11.0, 0.2 * 3.0 / 11.0, 0.2 * 6.0 / 11.0, 1.0];
        for (o, e) in out.iter().zip(expect) {
            assert!((o - e).abs() < 1e-12, "{out:?}");
        }
    }
}
