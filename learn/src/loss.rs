//! Losses over per-bus shed, pu. Each is applied twice and summed: to the per-bus amounts
//! (averaged over buses and samples) and to each sample's total (averaged over samples), so
//! the network learns both where to shed and how much in all.
//!
//! With `d = target - predicted` (positive when the prediction sheds too little):
//! - **Averse**: `mean(d^2) + w * mean(max(d, 0)^2)`, squared error plus a weighted squared
//!   shortfall; `w = 0` is the risk-neutral mean squared error.
//! - **Pinball** at quantile `tau`: `mean(max(tau * d, (tau - 1) * d))`, whose minimiser is the
//!   `tau`-quantile of the target; `tau > 0.5` leans to over-shedding.

use burn::prelude::*;
use burn::tensor::activation::relu;

/// The training loss.
#[derive(Clone, Copy, Debug, PartialEq)]
pub enum Loss {
    /// Squared error plus `under_weight` times the squared shortfall.
    Averse {
        /// Weight of the shortfall term (0: risk-neutral).
        under_weight: f64,
    },
    /// Quantile (pinball) loss at `tau` in (0, 1).
    Pinball {
        /// The quantile.
        tau: f64,
    },
}

impl Loss {
    /// Description for reports and the model file.
    pub fn describe(&self) -> String {
        match *self {
            Loss::Averse { under_weight: 0.0 } => "neutral (MSE)".to_string(),
            Loss::Averse { under_weight } => format!("averse (MSE + {under_weight} x shortfall^2)"),
            Loss::Pinball { tau } => format!("pinball (tau {tau})"),
        }
    }

    /// The loss of one difference `d = target - predicted`.
    pub fn pointwise(&self, d: f64) -> f64 {
        match *self {
            Loss::Averse { under_weight } => d * d + under_weight * d.max(0.0).powi(2),
            Loss::Pinball { tau } => (tau * d).max((tau - 1.0) * d),
        }
    }

    /// Its derivative with respect to the prediction.
    pub fn derivative(&self, d: f64) -> f64 {
        match *self {
            Loss::Averse { under_weight } => -2.0 * d - 2.0 * under_weight * d.max(0.0),
            Loss::Pinball { tau } => {
                if d > 0.0 {
                    -tau
                } else {
                    1.0 - tau
                }
            }
        }
    }

    /// The loss of a batch in plain arithmetic: `pred` and `target` are `[samples][buses]`.
    pub fn value(&self, pred: &[Vec<f64>], target: &[Vec<f64>]) -> f64 {
        let mut bus = 0.0;
        let mut n_bus = 0usize;
        let mut total = 0.0;
        for (p, t) in pred.iter().zip(target) {
            let mut dt = 0.0;
            for (a, b) in p.iter().zip(t) {
                bus += self.pointwise(b - a);
                dt += b - a;
                n_bus += 1;
            }
            total += self.pointwise(dt);
        }
        bus / n_bus.max(1) as f64 + total / pred.len().max(1) as f64
    }

    fn tensor_term<const D: usize>(&self, d: Tensor<D>) -> Tensor<1> {
        match *self {
            Loss::Averse { under_weight } => {
                let sq = d.clone().square().mean();
                if under_weight == 0.0 {
                    sq
                } else {
                    sq + relu(d).square().mean() * under_weight
                }
            }
            Loss::Pinball { tau } => (d.clone() * tau).max_pair(d * (tau - 1.0)).mean(),
        }
    }

    /// The loss of a batch on tensors: `pred` and `target` are `[samples, buses]`.
    pub fn tensor(&self, pred: Tensor<2>, target: Tensor<2>) -> Tensor<1> {
        let d = target - pred;
        let total = d.clone().sum_dim(1);
        self.tensor_term(d) + self.tensor_term(total)
    }
}
