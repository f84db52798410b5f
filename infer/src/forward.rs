//! The forward pass in plain Rust over a model file's weights, full neighbourhoods.
//!
//! GraphSAGE layer (mean aggregation), for node `i` with neighbours `N(i)`:
//! `h'_i = relu(h_i W_self + mean_{j in N(i)} h_j W_neigh + b)`, the mean being zero for a node
//! without neighbours. Branch embeddings reach their end buses as
//! `z_i = relu(h_i W_bus + mean_{k incident to i} e_k W_branch + b)`, and the head gives each
//! bus `sigmoid(z_i w + c) * sheddable_i`, so no bus sheds more than it can.

use crate::features::{GraphInput, N_BRANCH_FEATURES, N_BUS_FEATURES, zeroed};
use crate::model::{Architecture, ModelError, ModelFile};

/// A dense layer: `[inputs, outputs]` weight, row-major.
#[derive(Clone, Debug)]
struct Dense {
    w: Vec<f32>,
    inputs: usize,
    outputs: usize,
}

impl Dense {
    /// `out += x W` for every row of `x` (`rows x inputs`).
    fn accumulate(&self, x: &[f32], rows: usize, out: &mut [f32]) {
        for r in 0..rows {
            let xr = &x[r * self.inputs..(r + 1) * self.inputs];
            let o = &mut out[r * self.outputs..(r + 1) * self.outputs];
            for (i, &xi) in xr.iter().enumerate() {
                if xi == 0.0 {
                    continue;
                }
                let w = &self.w[i * self.outputs..(i + 1) * self.outputs];
                for (oj, wj) in o.iter_mut().zip(w) {
                    *oj += xi * wj;
                }
            }
        }
    }
}

#[derive(Clone, Debug)]
struct SageLayer {
    w_self: Dense,
    w_neigh: Dense,
    bias: Vec<f32>,
}

#[derive(Clone, Debug)]
enum Body {
    Sage {
        bus: Vec<SageLayer>,
        branch: Vec<SageLayer>,
        fuse: Option<(Dense, Dense, Vec<f32>)>,
    },
    Mlp {
        layers: Vec<(Dense, Vec<f32>)>,
        n_bus: usize,
        n_branch: usize,
    },
}

/// A model ready to run: weights unpacked from a [`ModelFile`].
#[derive(Clone, Debug)]
pub struct Network {
    body: Body,
    head: (Dense, Vec<f32>),
    bus_mean: Vec<f32>,
    bus_inv_std: Vec<f32>,
    branch_mean: Vec<f32>,
    branch_inv_std: Vec<f32>,
}

fn dense(m: &ModelFile, name: &str) -> Result<Dense, ModelError> {
    let a = m
        .array(name)
        .ok_or_else(|| ModelError::Weights(format!("array `{name}` is missing")))?;
    match a.shape[..] {
        [inputs, outputs] if a.data.len() == inputs * outputs => Ok(Dense {
            w: a.data.clone(),
            inputs,
            outputs,
        }),
        _ => Err(ModelError::Weights(format!(
            "array `{name}` is not a matrix"
        ))),
    }
}

fn vector(m: &ModelFile, name: &str) -> Result<Vec<f32>, ModelError> {
    m.array(name)
        .map(|a| a.data.clone())
        .ok_or_else(|| ModelError::Weights(format!("array `{name}` is missing")))
}

fn sage_layers(m: &ModelFile, tower: &str, n: usize) -> Result<Vec<SageLayer>, ModelError> {
    (0..n)
        .map(|l| {
            Ok(SageLayer {
                w_self: dense(m, &format!("{tower}{l}.w_self"))?,
                w_neigh: dense(m, &format!("{tower}{l}.w_neigh"))?,
                bias: vector(m, &format!("{tower}{l}.bias"))?,
            })
        })
        .collect()
}

fn relu(x: &mut [f32]) {
    for v in x {
        *v = v.max(0.0);
    }
}

fn sigmoid(x: f32) -> f32 {
    1.0 / (1.0 + (-x).exp())
}

/// Adds `bias` to every row.
fn add_bias(x: &mut [f32], bias: &[f32]) {
    for row in x.chunks_mut(bias.len()) {
        for (v, b) in row.iter_mut().zip(bias) {
            *v += b;
        }
    }
}

/// Mean of the neighbours' rows (`width` wide), zero rows for nodes without neighbours.
fn mean_rows(h: &[f32], width: usize, adj: &crate::features::Csr, out: &mut [f32]) {
    out.fill(0.0);
    for i in 0..adj.len() {
        let nb = adj.neighbours(i);
        if nb.is_empty() {
            continue;
        }
        let o = &mut out[i * width..(i + 1) * width];
        for &j in nb {
            let r = &h[j as usize * width..(j as usize + 1) * width];
            for (a, b) in o.iter_mut().zip(r) {
                *a += b;
            }
        }
        let inv = 1.0 / nb.len() as f32;
        for a in o {
            *a *= inv;
        }
    }
}

/// Runs a GraphSAGE tower: `h` holds the inputs (`rows` rows) on entry and the embeddings on
/// return; `out` and `agg` are scratch.
fn sage_tower(
    layers: &[SageLayer],
    h: &mut Vec<f32>,
    out: &mut Vec<f32>,
    agg: &mut Vec<f32>,
    rows: usize,
    adj: &crate::features::Csr,
) {
    for layer in layers {
        zeroed(agg, rows * layer.w_self.inputs);
        mean_rows(h, layer.w_self.inputs, adj, agg);
        zeroed(out, rows * layer.w_self.outputs);
        layer.w_self.accumulate(h, rows, out);
        layer.w_neigh.accumulate(agg, rows, out);
        add_bias(out, &layer.bias);
        relu(out);
        std::mem::swap(h, out);
    }
}

/// `out = (x - mean) * inv_std`, row by row.
fn normalise_into(x: &[f32], mean: &[f32], inv_std: &[f32], out: &mut Vec<f32>) {
    out.clear();
    out.extend_from_slice(x);
    for row in out.chunks_mut(mean.len()) {
        for ((v, m), s) in row.iter_mut().zip(mean).zip(inv_std) {
            *v = (*v - m) * s;
        }
    }
}

/// Scratch storage of the forward pass: once it has served one input of a grid, further
/// passes on that grid allocate nothing.
#[derive(Clone, Debug, Default)]
pub struct ForwardBuffers {
    bus: Vec<f32>,
    branch: Vec<f32>,
    out: Vec<f32>,
    agg: Vec<f32>,
    z: Vec<f32>,
}

impl Network {
    /// Unpacks and checks a model's weights.
    pub fn new(model: &ModelFile) -> Result<Network, ModelError> {
        model.check()?;
        let body = match model.architecture {
            Architecture::Sage {
                bus_layers,
                branch_layers,
                ..
            } => Body::Sage {
                bus: sage_layers(model, "bus", bus_layers)?,
                branch: sage_layers(model, "branch", branch_layers)?,
                fuse: if branch_layers > 0 {
                    Some((
                        dense(model, "fuse.w_bus")?,
                        dense(model, "fuse.w_branch")?,
                        vector(model, "fuse.bias")?,
                    ))
                } else {
                    None
                },
            },
            Architecture::Mlp {
                layers,
                n_bus,
                n_branch,
                ..
            } => Body::Mlp {
                layers: (0..layers)
                    .map(|l| {
                        Ok((
                            dense(model, &format!("mlp{l}.w"))?,
                            vector(model, &format!("mlp{l}.bias"))?,
                        ))
                    })
                    .collect::<Result<_, ModelError>>()?,
                n_bus,
                n_branch,
            },
        };
        let n = &model.normalisation;
        Ok(Network {
            body,
            head: (dense(model, "head.w")?, vector(model, "head.bias")?),
            bus_mean: n.bus_mean.clone(),
            bus_inv_std: n.bus_std.iter().map(|s| 1.0 / s).collect(),
            branch_mean: n.branch_mean.clone(),
            branch_inv_std: n.branch_std.iter().map(|s| 1.0 / s).collect(),
        })
    }

    /// Per-bus shed, pu, before any safety margin; each within `0..=sheddable_pu`.
    pub fn predict(&self, input: &GraphInput) -> Result<Vec<f64>, ModelError> {
        let mut out = Vec::new();
        self.predict_into(input, &mut ForwardBuffers::default(), &mut out)?;
        Ok(out)
    }

    /// Like [`Network::predict`], writing into `out` with reused scratch buffers.
    pub fn predict_into(
        &self,
        input: &GraphInput,
        buffers: &mut ForwardBuffers,
        out: &mut Vec<f64>,
    ) -> Result<(), ModelError> {
        let n = input.n_bus();
        let m = input.n_branch();
        if input.bus_x.len() != n * N_BUS_FEATURES || input.branch_x.len() != m * N_BRANCH_FEATURES
        {
            return Err(ModelError::Weights(
                "input feature arrays do not match the feature set".into(),
            ));
        }
        let ForwardBuffers {
            bus: hb,
            branch: he,
            out: scratch,
            agg,
            z,
        } = buffers;
        normalise_into(&input.bus_x, &self.bus_mean, &self.bus_inv_std, hb);
        normalise_into(&input.branch_x, &self.branch_mean, &self.branch_inv_std, he);
        let (head, head_bias) = &self.head;
        // The logits end up in `scratch`.
        match &self.body {
            Body::Sage { bus, branch, fuse } => {
                sage_tower(bus, hb, scratch, agg, n, &input.bus_adj);
                let z = match fuse {
                    None => hb,
                    Some((w_bus, w_branch, bias)) => {
                        sage_tower(branch, he, scratch, agg, m, &input.branch_adj);
                        let width = w_branch.inputs;
                        zeroed(agg, n * width);
                        mean_rows(he, width, &input.bus_branches, agg);
                        zeroed(z, n * w_bus.outputs);
                        w_bus.accumulate(hb, n, z);
                        w_branch.accumulate(agg, n, z);
                        add_bias(z, bias);
                        relu(z);
                        z
                    }
                };
                zeroed(scratch, n);
                head.accumulate(z, n, scratch);
                for v in scratch.iter_mut() {
                    *v += head_bias[0];
                }
            }
            Body::Mlp {
                layers,
                n_bus,
                n_branch,
            } => {
                if *n_bus != n || *n_branch != m {
                    return Err(ModelError::Weights(format!(
                        "this baseline model is fixed to {n_bus} buses and {n_branch} branches; \
                         the input has {n} and {m}"
                    )));
                }
                hb.extend_from_slice(he);
                for (w, b) in layers {
                    zeroed(scratch, w.outputs);
                    w.accumulate(hb, 1, scratch);
                    add_bias(scratch, b);
                    relu(scratch);
                    std::mem::swap(hb, scratch);
                }
                zeroed(scratch, n);
                head.accumulate(hb, 1, scratch);
                add_bias(scratch, head_bias);
            }
        }
        out.clear();
        out.extend(
            scratch
                .iter()
                .zip(&input.sheddable_pu)
                .map(|(&l, &s)| f64::from(sigmoid(l)) * s),
        );
        Ok(())
    }
}

/// Adds the safety margin: each bus sheds `min(sheddable, predicted + share * sheddable)`.
pub fn apply_margin(pred_pu: &[f64], sheddable_pu: &[f64], share: f64) -> Vec<f64> {
    let mut out = pred_pu.to_vec();
    apply_margin_in_place(&mut out, sheddable_pu, share);
    out
}

/// [`apply_margin`] in place.
pub fn apply_margin_in_place(shed_pu: &mut [f64], sheddable_pu: &[f64], share: f64) {
    for (p, &s) in shed_pu.iter_mut().zip(sheddable_pu) {
        *p = (*p + share * s).min(s);
    }
}
