//! The networks on burn tensors, for training: batches with dense, row-normalised
//! neighbourhood matrices (neighbours sampled per layer), and a forward pass that mirrors
//! `holdfast_infer::forward` exactly when every neighbour is kept.
//!
//! Parameters live outside burn as plain arrays in the order of
//! [`Architecture::parameters`]; each step lifts them into tracked tensors, so the weights
//! that train are the weights that serving reads.

use std::collections::HashMap;

use burn::prelude::*;
use burn::tensor::activation::{relu, sigmoid};
use holdfast_infer::features::{Csr, GraphInput, N_BRANCH_FEATURES, N_BUS_FEATURES};
use holdfast_infer::model::{Architecture, Array, Normalisation};
use rand::Rng;
use rand::seq::index::sample;

use crate::data::Example;

/// Fresh parameters: weights uniform in `+-sqrt(6 / (inputs + outputs))` (Glorot), biases 0.
pub fn init_parameters(arch: &Architecture, rng: &mut impl Rng) -> Vec<Array> {
    arch.parameters()
        .into_iter()
        .map(|(name, shape)| {
            let len = shape.iter().product();
            let data = if shape.len() == 2 {
                let k = (6.0 / (shape[0] + shape[1]) as f64).sqrt() as f32;
                (0..len).map(|_| rng.random_range(-k..k)).collect()
            } else {
                vec![0.0; len]
            };
            Array { name, shape, data }
        })
        .collect()
}

/// Per-feature mean and deviation over the nodes of the given examples.
pub fn fit_normalisation(examples: &[&Example]) -> Normalisation {
    let mut fit = NormalisationFit::default();
    for e in examples {
        fit.add(&e.input);
    }
    fit.finish()
}

/// Running sums for per-feature means and deviations, fed one example at a time (a dataset's
/// training split need not be in memory at once). Sums of values and squares in f64, as the
/// in-memory fit did: `E[x^2] - E[x]^2` loses accuracy only for a feature whose deviation is
/// below about 1e-5 of its mean over a million rows, which the demo features are far from;
/// shifted sums would remove even that, at the price of every model's normalisation bits.
#[derive(Clone, Debug, Default)]
pub struct NormalisationFit {
    bus: FeatureSums,
    branch: FeatureSums,
}

#[derive(Clone, Debug, Default)]
struct FeatureSums {
    sum: Vec<f64>,
    squares: Vec<f64>,
    rows: usize,
}

impl FeatureSums {
    fn add(&mut self, x: &[f32], width: usize) {
        if self.sum.is_empty() {
            self.sum = vec![0.0; width];
            self.squares = vec![0.0; width];
        }
        for row in x.chunks_exact(width) {
            for (k, &v) in row.iter().enumerate() {
                let v = f64::from(v);
                self.sum[k] += v;
                self.squares[k] += v * v;
            }
            self.rows += 1;
        }
    }

    /// Means and deviations (1 where a feature does not vary).
    fn finish(&self, width: usize) -> (Vec<f32>, Vec<f32>) {
        let n = self.rows.max(1) as f64;
        (0..width)
            .map(|k| {
                let mean = self.sum.get(k).map_or(0.0, |s| s / n);
                let square = self.squares.get(k).map_or(0.0, |q| q / n);
                let std = (square - mean * mean).max(0.0).sqrt();
                (mean as f32, if std > 1e-6 { std as f32 } else { 1.0 })
            })
            .unzip()
    }
}

impl NormalisationFit {
    /// Adds one example's nodes.
    pub fn add(&mut self, input: &GraphInput) {
        self.bus.add(&input.bus_x, N_BUS_FEATURES);
        self.branch.add(&input.branch_x, N_BRANCH_FEATURES);
    }

    /// The normalisation of everything added.
    pub fn finish(&self) -> Normalisation {
        let (bus_mean, bus_std) = self.bus.finish(N_BUS_FEATURES);
        let (branch_mean, branch_std) = self.branch.finish(N_BRANCH_FEATURES);
        Normalisation {
            bus_mean,
            bus_std,
            branch_mean,
            branch_std,
        }
    }
}

/// One batch as tensors.
pub struct Batch {
    /// Normalised bus features `[B, N, F_bus]`.
    pub x_bus: Tensor<3>,
    /// Normalised branch features `[B, M, F_branch]`.
    pub x_branch: Tensor<3>,
    /// Bus-graph mean matrices, one per bus layer, `[B, N, N]`.
    pub a_bus: Vec<Tensor<3>>,
    /// Branch-graph mean matrices, one per branch layer, `[B, M, M]`.
    pub a_branch: Vec<Tensor<3>>,
    /// Bus-from-branch mean matrix `[B, N, M]` (branches in service after the contingency).
    pub incidence: Tensor<3>,
    /// Shed-able load per bus, pu, `[B, N]`.
    pub sheddable: Tensor<2>,
    /// Labelled shed per bus, pu, `[B, N]`.
    pub target: Tensor<2>,
}

/// Fills `out` (`nodes x nodes`, zeroed) with the mean matrix of `adj`, keeping at most
/// `keep` neighbours per node (drawn without replacement), all when `keep` is `None`.
fn mean_matrix(adj: &Csr, keep: Option<usize>, rng: &mut impl Rng, out: &mut [f32], cols: usize) {
    for i in 0..adj.len() {
        let nb = adj.neighbours(i);
        let row = &mut out[i * cols..(i + 1) * cols];
        match keep {
            Some(k) if nb.len() > k => {
                let w = 1.0 / k as f32;
                for j in sample(rng, nb.len(), k) {
                    row[nb[j] as usize] = w;
                }
            }
            _ => {
                if !nb.is_empty() {
                    let w = 1.0 / nb.len() as f32;
                    for &j in nb {
                        row[j as usize] = w;
                    }
                }
            }
        }
    }
}

fn normalised(x: &[f32], mean: &[f32], std: &[f32], out: &mut Vec<f32>) {
    for row in x.chunks(mean.len()) {
        out.extend(row.iter().zip(mean).zip(std).map(|((v, m), s)| (v - m) / s));
    }
}

/// Builds a batch; `keep` neighbours per node and layer (`None`: all, as at inference).
pub fn build_batch(
    examples: &[&Example],
    arch: &Architecture,
    norm: &Normalisation,
    keep: Option<usize>,
    rng: &mut impl Rng,
    device: &Device,
) -> Batch {
    let b = examples.len();
    let n = examples[0].input.n_bus();
    let m = examples[0].input.n_branch();
    let (bus_layers, branch_layers) = match *arch {
        Architecture::Sage {
            bus_layers,
            branch_layers,
            ..
        } => (bus_layers, branch_layers),
        Architecture::Mlp { .. } => (0, 0),
    };
    let mut xb = Vec::with_capacity(b * n * N_BUS_FEATURES);
    let mut xe = Vec::with_capacity(b * m * N_BRANCH_FEATURES);
    let mut shed = Vec::with_capacity(b * n);
    let mut target = Vec::with_capacity(b * n);
    for e in examples {
        normalised(&e.input.bus_x, &norm.bus_mean, &norm.bus_std, &mut xb);
        normalised(
            &e.input.branch_x,
            &norm.branch_mean,
            &norm.branch_std,
            &mut xe,
        );
        shed.extend(e.input.sheddable_pu.iter().map(|&x| x as f32));
        target.extend(e.target_pu.iter().map(|&x| x as f32));
    }
    // One matrix per layer and graph, `rows x cols` per sample, neighbours drawn afresh for each.
    let mut matrices = |count: usize,
                        rows: usize,
                        cols: usize,
                        keep: Option<usize>,
                        lists: &dyn Fn(&Example) -> &Csr| {
        (0..count)
            .map(|_| {
                let mut a = vec![0.0f32; b * rows * cols];
                for (e, block) in examples.iter().zip(a.chunks_mut(rows * cols)) {
                    mean_matrix(lists(e), keep, rng, block, cols);
                }
                Tensor::<3>::from_data(TensorData::new(a, [b, rows, cols]), device)
            })
            .collect::<Vec<_>>()
    };
    let a_bus = matrices(bus_layers, n, n, keep, &|e| &e.input.bus_adj);
    let a_branch = matrices(branch_layers, m, m, keep, &|e| &e.input.branch_adj);
    let incidence = matrices(usize::from(branch_layers > 0), n, m, None, &|e| {
        &e.input.bus_branches
    })
    .pop()
    .unwrap_or_else(|| Tensor::<3>::zeros([1, 1, 1], device));
    Batch {
        x_bus: Tensor::from_data(TensorData::new(xb, [b, n, N_BUS_FEATURES]), device),
        x_branch: Tensor::from_data(TensorData::new(xe, [b, m, N_BRANCH_FEATURES]), device),
        a_bus,
        a_branch,
        incidence,
        sheddable: Tensor::from_data(TensorData::new(shed, [b, n]), device),
        target: Tensor::from_data(TensorData::new(target, [b, n]), device),
    }
}

/// Parameters as tensors (vectors as `[1, len]` rows), in the architecture's order.
pub fn parameter_tensors(params: &[Array], device: &Device, track: bool) -> Vec<Tensor<2>> {
    params
        .iter()
        .map(|a| {
            let shape = if a.shape.len() == 2 {
                [a.shape[0], a.shape[1]]
            } else {
                [1, a.data.len()]
            };
            let t = Tensor::<2>::from_data(TensorData::new(a.data.clone(), shape), device);
            if track { t.require_grad() } else { t }
        })
        .collect()
}

/// One GraphSAGE layer on `[B, nodes, F]`.
fn sage(
    h: Tensor<3>,
    a: &Tensor<3>,
    w_self: Tensor<2>,
    w_neigh: Tensor<2>,
    bias: Tensor<2>,
) -> Tensor<3> {
    let [b, n, f] = h.dims();
    let out = w_self.dims()[1];
    let agg = a.clone().matmul(h.clone());
    let x = h.reshape([b * n, f]).matmul(w_self) + agg.reshape([b * n, f]).matmul(w_neigh) + bias;
    relu(x).reshape([b, n, out])
}

/// The forward pass: per-bus shed, pu, `[B, N]`, each within `0..=sheddable`.
pub fn forward(arch: &Architecture, params: &[Tensor<2>], batch: &Batch) -> Tensor<2> {
    let index: HashMap<String, usize> = arch
        .parameters()
        .into_iter()
        .enumerate()
        .map(|(k, (name, _))| (name, k))
        .collect();
    let p = |name: &str| params[index[name]].clone();
    let [b, n, _] = batch.x_bus.dims();
    let logits = match *arch {
        Architecture::Sage {
            bus_layers,
            branch_layers,
            ..
        } => {
            let mut h = batch.x_bus.clone();
            for l in 0..bus_layers {
                h = sage(
                    h,
                    &batch.a_bus[l],
                    p(&format!("bus{l}.w_self")),
                    p(&format!("bus{l}.w_neigh")),
                    p(&format!("bus{l}.bias")),
                );
            }
            let width = h.dims()[2];
            let z = if branch_layers > 0 {
                let mut e = batch.x_branch.clone();
                for l in 0..branch_layers {
                    e = sage(
                        e,
                        &batch.a_branch[l],
                        p(&format!("branch{l}.w_self")),
                        p(&format!("branch{l}.w_neigh")),
                        p(&format!("branch{l}.bias")),
                    );
                }
                let we = e.dims()[2];
                let agg = batch.incidence.clone().matmul(e);
                relu(
                    h.reshape([b * n, width]).matmul(p("fuse.w_bus"))
                        + agg.reshape([b * n, we]).matmul(p("fuse.w_branch"))
                        + p("fuse.bias"),
                )
            } else {
                h.reshape([b * n, width])
            };
            (z.matmul(p("head.w")) + p("head.bias")).reshape([b, n])
        }
        Architecture::Mlp { layers, .. } => {
            let [_, m, fe] = batch.x_branch.dims();
            let fb = batch.x_bus.dims()[2];
            let mut h = Tensor::cat(
                vec![
                    batch.x_bus.clone().reshape([b, n * fb]),
                    batch.x_branch.clone().reshape([b, m * fe]),
                ],
                1,
            );
            for l in 0..layers {
                h = relu(h.matmul(p(&format!("mlp{l}.w"))) + p(&format!("mlp{l}.bias")));
            }
            h.matmul(p("head.w")) + p("head.bias")
        }
    };
    sigmoid(logits) * batch.sheddable.clone()
}
