//! Topology: the bus graph, the branch graph, islands after outages, and electrical distance.
//!
//! Graphs are built with petgraph. Node weights carry our dense indices, so a graph built under
//! one set of [`Outages`] still speaks of the grid's own buses and branches.

use faer::Mat;
use faer::prelude::Solve;
use faer::sparse::{SparseColMat, Triplet};
use petgraph::graph::{NodeIndex, UnGraph};
use petgraph::unionfind::UnionFind;

use crate::Complex;
use crate::model::{BranchIdx, BusIdx, Grid, MachineIdx, Outages};
use crate::ybus::branch_admittance;

/// The bus graph: one node per bus (node `i` is `BusIdx(i)`), one edge per in-service branch.
pub fn bus_graph(grid: &Grid, outages: &Outages) -> UnGraph<BusIdx, BranchIdx> {
    let mut g = UnGraph::with_capacity(grid.n_buses(), grid.branches.len());
    for i in 0..grid.n_buses() {
        g.add_node(BusIdx(i as u32));
    }
    for (k, br) in grid.branches.iter().enumerate() {
        let idx = BranchIdx(k as u32);
        if outages.branch_in_service(grid, idx) {
            g.add_edge(
                NodeIndex::new(br.from.get()),
                NodeIndex::new(br.to.get()),
                idx,
            );
        }
    }
    g
}

/// The branch graph: one node per in-service branch, with an edge between two branches for each
/// bus they share (the edge weight names that bus).
pub fn branch_graph(grid: &Grid, outages: &Outages) -> UnGraph<BranchIdx, BusIdx> {
    let mut g = UnGraph::default();
    let mut at_bus: Vec<Vec<NodeIndex>> = vec![Vec::new(); grid.n_buses()];
    for (k, br) in grid.branches.iter().enumerate() {
        let idx = BranchIdx(k as u32);
        if !outages.branch_in_service(grid, idx) {
            continue;
        }
        let node = g.add_node(idx);
        at_bus[br.from.get()].push(node);
        at_bus[br.to.get()].push(node);
    }
    for (bus, nodes) in at_bus.iter().enumerate() {
        for (a, &na) in nodes.iter().enumerate() {
            for &nb in &nodes[a + 1..] {
                if na != nb {
                    g.add_edge(na, nb, BusIdx(bus as u32));
                }
            }
        }
    }
    g
}

/// The islands of a grid under some outages.
#[derive(Clone, Debug, PartialEq)]
pub struct Islands {
    /// Island number of each bus, `0..n_islands`, numbered in order of their lowest bus index.
    pub of_bus: Vec<usize>,
    /// Buses of each island, in index order.
    pub members: Vec<Vec<BusIdx>>,
}

/// Splits the grid into islands joined by in-service branches.
pub fn islands(grid: &Grid, outages: &Outages) -> Islands {
    let n = grid.n_buses();
    let mut uf = UnionFind::<usize>::new(n);
    for (k, br) in grid.branches.iter().enumerate() {
        if outages.branch_in_service(grid, BranchIdx(k as u32)) {
            uf.union(br.from.get(), br.to.get());
        }
    }
    let mut label_of_root = vec![usize::MAX; n];
    let mut of_bus = vec![0; n];
    let mut members: Vec<Vec<BusIdx>> = Vec::new();
    for (i, slot) in of_bus.iter_mut().enumerate() {
        let root = uf.find(i);
        if label_of_root[root] == usize::MAX {
            label_of_root[root] = members.len();
            members.push(Vec::new());
        }
        *slot = label_of_root[root];
        members[*slot].push(BusIdx(i as u32));
    }
    Islands { of_bus, members }
}

/// A problem with the reference buses, found by [`check_references`].
#[derive(Clone, Debug, PartialEq)]
pub(crate) struct ReferenceProblem {
    pub(crate) bus: Option<BusIdx>,
    pub(crate) record: String,
    pub(crate) message: String,
}

/// Checks the base case: every island with an in-service machine has exactly one reference
/// bus, and each reference bus holds an in-service machine that regulates voltage.
pub(crate) fn check_references(grid: &Grid) -> Vec<ReferenceProblem> {
    let none = Outages::none();
    let isl = islands(grid, &none);
    let mut problems = Vec::new();
    for members in &isl.members {
        let has_machine = members
            .iter()
            .any(|&b| regulating_machines(grid, &none, b).next().is_some());
        let refs: Vec<BusIdx> = members
            .iter()
            .copied()
            .filter(|&b| grid.bus(b).is_reference)
            .collect();
        let first = members[0];
        let island_name = format!(
            "island of {} bus(es) starting at bus {}",
            members.len(),
            grid.bus(first).number
        );
        if has_machine && refs.is_empty() {
            problems.push(ReferenceProblem {
                bus: Some(first),
                record: format!("bus {}", grid.bus(first).number),
                message: format!("energised {island_name} has no reference bus; set `reference = true` on one of its generator buses"),
            });
        }
        if refs.len() > 1 {
            let numbers: Vec<String> = refs
                .iter()
                .map(|&b| grid.bus(b).number.to_string())
                .collect();
            problems.push(ReferenceProblem {
                bus: Some(refs[1]),
                record: format!("bus {}", grid.bus(refs[1]).number),
                message: format!(
                    "{island_name} has {} reference buses ({}); keep one",
                    refs.len(),
                    numbers.join(", ")
                ),
            });
        }
        for &r in &refs {
            if regulating_machines(grid, &none, r).next().is_none() {
                problems.push(ReferenceProblem {
                    bus: Some(r),
                    record: format!("bus {}", grid.bus(r).number),
                    message: "a reference bus needs an in-service machine with `v_set_pu`"
                        .to_string(),
                });
            }
        }
    }
    problems
}

/// The in-service machines at `bus` that regulate voltage.
pub fn regulating_machines<'a>(
    grid: &'a Grid,
    outages: &'a Outages,
    bus: BusIdx,
) -> impl Iterator<Item = MachineIdx> + 'a {
    grid.machines.iter().enumerate().filter_map(move |(k, m)| {
        let idx = MachineIdx(k as u32);
        (m.bus == bus && m.v_set_pu.is_some() && outages.machine_in_service(grid, idx))
            .then_some(idx)
    })
}

/// Electrical distance between every pair of buses, pu impedance on the system base.
///
/// The distance between buses `i` and `j` is the magnitude of the Thevenin impedance seen
/// between them through the series branch impedances (shunts and charging left out):
/// `|Z_ii + Z_jj - Z_ij - Z_ji|`, with `Z` the inverse of the series admittance matrix of the
/// island grounded at one bus (the result does not depend on which). Buses in different islands
/// are infinitely far apart. It is symmetric, zero on the diagonal, and for a chain of series
/// impedances adds like them. Cost: one sparse LU and `n` solves per island; meant for grids of
/// up to a few thousand buses.
#[derive(Clone, Debug, PartialEq)]
pub struct DistanceMatrix {
    /// Number of buses.
    pub n: usize,
    /// Row-major `n x n` distances, pu.
    pub values_pu: Vec<f64>,
}

impl DistanceMatrix {
    /// The distance between two buses, pu.
    pub fn get(&self, a: BusIdx, b: BusIdx) -> f64 {
        self.values_pu[a.get() * self.n + b.get()]
    }
}

/// Computes the [`DistanceMatrix`] of a grid under some outages.
pub fn electrical_distance(grid: &Grid, outages: &Outages) -> DistanceMatrix {
    let n = grid.n_buses();
    let mut values = vec![f64::INFINITY; n * n];
    for i in 0..n {
        values[i * n + i] = 0.0;
    }
    let isl = islands(grid, outages);
    for members in &isl.members {
        let m = members.len();
        if m < 2 {
            continue;
        }
        // Local numbering: member 0 is grounded; the others are 0..m-1 in the reduced matrix.
        let mut local = vec![usize::MAX; n];
        for (pos, b) in members.iter().enumerate() {
            local[b.get()] = pos;
        }
        let mut triplets = Vec::new();
        for (k, br) in grid.branches.iter().enumerate() {
            if !outages.branch_in_service(grid, BranchIdx(k as u32))
                || local[br.from.get()] == usize::MAX
            {
                continue;
            }
            let [ff, ft, tf, tt] = branch_admittance(br.r_pu, br.x_pu, 0.0, 1.0, 0.0);
            let (f, t) = (local[br.from.get()], local[br.to.get()]);
            for (r, c, v) in [(f, f, ff), (f, t, ft), (t, f, tf), (t, t, tt)] {
                if r > 0 && c > 0 {
                    triplets.push(Triplet::new(r - 1, c - 1, v));
                }
            }
        }
        let Ok(y) = SparseColMat::<usize, Complex>::try_new_from_triplets(m - 1, m - 1, &triplets)
        else {
            continue;
        };
        let Ok(lu) = y.sp_lu() else {
            continue;
        };
        let mut z = Mat::<Complex>::identity(m - 1, m - 1);
        lu.solve_in_place(z.as_mut());
        let zl = |a: usize, b: usize| {
            if a == 0 || b == 0 {
                Complex::new(0.0, 0.0)
            } else {
                z[(a - 1, b - 1)]
            }
        };
        for a in 0..m {
            for b in 0..m {
                let d = (zl(a, a) + zl(b, b) - zl(a, b) - zl(b, a)).norm();
                values[members[a].get() * n + members[b].get()] = d;
            }
        }
    }
    DistanceMatrix {
        n,
        values_pu: values,
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::format::parse_grid;
    use std::path::Path;

    /// Buses 1-2-3 in a chain plus two parallel lines 3-4, and an isolated bus 5 (made up).
    const CHAIN: &str = r#"
format_version = 1
name = "chain"
s_base_mva = 100.0
frequency_hz = 50.0
[[bus]]
id = 1
base_kv = 230.0
reference = true
[[bus]]
id = 2
base_kv = 230.0
[[bus]]
id = 3
base_kv = 230.0
[[bus]]
id = 4
base_kv = 230.0
[[bus]]
id = 5
base_kv = 230.0
[[line]]
id = "a"
from = 1
to = 2
r_pu = 0.01
x_pu = 0.10
b_pu = 0.5
[[line]]
id = "b"
from = 2
to = 3
r_pu = 0.02
x_pu = 0.20
[[line]]
id = "c1"
from = 3
to = 4
r_pu = 0.0
x_pu = 0.30
[[line]]
id = "c2"
from = 3
to = 4
r_pu = 0.0
x_pu = 0.60
[[machine]]
id = "G"
bus = 1
p_mw = 0.0
v_set_pu = 1.0
rating_mva = 100.0
"#;

    fn chain() -> Grid {
        parse_grid(CHAIN, Path::new("chain.toml")).unwrap()
    }

    #[test]
    fn electrical_distance_adds_in_series_and_combines_in_parallel() {
        // Circuit laws (closed form): series impedances add; parallel ones combine as z1 z2 / (z1 + z2).
        let g = chain();
        let d = electrical_distance(&g, &Outages::none());
        let b = |n: u32| g.bus_idx(n).unwrap();
        let z12 = Complex::new(0.01, 0.10);
        let z23 = Complex::new(0.02, 0.20);
        let z34 = Complex::new(0.0, 0.30 * 0.60 / 0.90);
        assert!((d.get(b(1), b(2)) - z12.norm()).abs() < 1e-12);
        assert!((d.get(b(1), b(3)) - (z12 + z23).norm()).abs() < 1e-12);
        assert!((d.get(b(3), b(4)) - z34.norm()).abs() < 1e-12);
        assert!((d.get(b(1), b(4)) - (z12 + z23 + z34).norm()).abs() < 1e-12);
        assert_eq!(d.get(b(2), b(1)), d.get(b(1), b(2)));
        assert_eq!(d.get(b(3), b(3)), 0.0);
        assert!(d.get(b(1), b(5)).is_infinite());
    }

    #[test]
    fn islands_follow_outages() {
        let g = chain();
        let isl = islands(&g, &Outages::none());
        assert_eq!(isl.members.len(), 2); // buses 1-4, and bus 5 alone
        let out = Outages {
            branches: vec![BranchIdx(1)],
            ..Outages::default()
        };
        let isl = islands(&g, &out);
        assert_eq!(isl.members.len(), 3);
        assert_eq!(isl.of_bus[0], isl.of_bus[1]);
        assert_ne!(isl.of_bus[1], isl.of_bus[2]);
        // One of two parallel lines out: still connected.
        let out = Outages {
            branches: vec![BranchIdx(2)],
            ..Outages::default()
        };
        assert_eq!(islands(&g, &out).members.len(), 2);
    }

    #[test]
    fn bus_and_branch_graphs() {
        let g = chain();
        let bus = bus_graph(&g, &Outages::none());
        assert_eq!((bus.node_count(), bus.edge_count()), (5, 4));
        let br = branch_graph(&g, &Outages::none());
        // Branches a-b share bus 2; b-c1, b-c2 share bus 3; c1-c2 share buses 3 and 4.
        assert_eq!(br.node_count(), 4);
        assert_eq!(br.edge_count(), 5);
        let out = Outages {
            branches: vec![BranchIdx(1)],
            ..Outages::default()
        };
        let br = branch_graph(&g, &out);
        assert_eq!((br.node_count(), br.edge_count()), (3, 2));
    }
}
