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
        let mut sum = LossSum::default();
        for (p, t) in pred.iter().zip(target) {
            sum.add(self, p, t);
        }
        sum.value()
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

/// A loss summed one sample at a time ([`Loss::value`] of everything added), so a split that
/// is not in memory at once can be scored.
#[derive(Clone, Copy, Debug, Default, PartialEq)]
pub struct LossSum {
    bus: f64,
    buses: usize,
    total: f64,
    samples: usize,
}

impl LossSum {
    /// Adds one sample's per-bus prediction and target.
    pub fn add(&mut self, loss: &Loss, pred: &[f64], target: &[f64]) {
        let mut dt = 0.0;
        for (a, b) in pred.iter().zip(target) {
            self.bus += loss.pointwise(b - a);
            dt += b - a;
            self.buses += 1;
        }
        self.total += loss.pointwise(dt);
        self.samples += 1;
    }

    /// Mean per-bus loss plus mean per-sample total loss.
    pub fn value(&self) -> f64 {
        self.bus / self.buses.max(1) as f64 + self.total / self.samples.max(1) as f64
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::train::training_device;

    #[test]
    fn hand_worked_values() {
        // One sample, two buses: predicted [1, 2], labelled [2, 1], so d = [1, -1], total 0.
        // Averse, w = 4: buses (1 + 4 * 1 + 1) / 2 = 3; total 0.
        let pred = vec![vec![1.0, 2.0]];
        let target = vec![vec![2.0, 1.0]];
        assert_eq!(
            Loss::Averse { under_weight: 4.0 }.value(&pred, &target),
            3.0
        );
        assert_eq!(
            Loss::Averse { under_weight: 0.0 }.value(&pred, &target),
            1.0
        );
        // Pinball, tau 0.9: buses (0.9 * 1 + 0.1 * 1) / 2 = 0.5; total 0.
        assert!((Loss::Pinball { tau: 0.9 }.value(&pred, &target) - 0.5).abs() < 1e-12);
        // Under-shedding the total by 2: predicted [0, 0], labelled [1, 1].
        // Averse w = 4: buses (5 + 5) / 2 = 5; total 4 + 4 * 4 = 20; sum 25.
        let pred = vec![vec![0.0, 0.0]];
        let target = vec![vec![1.0, 1.0]];
        assert_eq!(
            Loss::Averse { under_weight: 4.0 }.value(&pred, &target),
            25.0
        );
        // Pinball: buses 0.9, total 1.8.
        assert!((Loss::Pinball { tau: 0.9 }.value(&pred, &target) - 2.7).abs() < 1e-12);
    }

    #[test]
    fn tensor_loss_and_gradient_match_plain_arithmetic_and_finite_differences() {
        let device = training_device();
        let pred = vec![vec![0.3, 0.0, 1.2], vec![0.45, 0.7, 0.1]];
        let target = vec![vec![0.5, 0.1, 1.0], vec![0.5, 0.2, 0.6]];
        let flat = |v: &[Vec<f64>]| v.iter().flatten().map(|&x| x as f32).collect::<Vec<f32>>();
        for loss in [
            Loss::Averse { under_weight: 0.0 },
            Loss::Averse { under_weight: 3.0 },
            Loss::Pinball { tau: 0.8 },
        ] {
            let p = Tensor::<2>::from_data(TensorData::new(flat(&pred), [2, 3]), &device)
                .require_grad();
            let t = Tensor::<2>::from_data(TensorData::new(flat(&target), [2, 3]), &device);
            let l = loss.tensor(p.clone(), t);
            let value = f64::from(l.clone().into_scalar::<f32>());
            let plain = loss.value(&pred, &target);
            assert!((value - plain).abs() < 1e-6, "{loss:?}: {value} vs {plain}");
            let grads = l.backward();
            let g: Vec<f32> = p.grad(&grads).unwrap().into_data().try_into_vec().unwrap();
            // Central differences on the plain loss (no difference is within h of a kink).
            let h = 1e-6;
            for k in 0..6 {
                let (i, j) = (k / 3, k % 3);
                let mut up = pred.clone();
                up[i][j] += h;
                let mut down = pred.clone();
                down[i][j] -= h;
                let fd = (loss.value(&up, &target) - loss.value(&down, &target)) / (2.0 * h);
                assert!(
                    (f64::from(g[k]) - fd).abs() < 1e-4,
                    "{loss:?} d/dpred[{i}][{j}]: autodiff {} vs finite difference {fd}",
                    g[k]
                );
                // And by hand: per-bus term / (buses x samples) + total term / samples.
                let d_bus = target[i][j] - pred[i][j];
                let d_total: f64 = (0..3).map(|c| target[i][c] - pred[i][c]).sum();
                let by_hand = loss.derivative(d_bus) / 6.0 + loss.derivative(d_total) / 2.0;
                assert!((by_hand - fd).abs() < 1e-6, "{loss:?}: {by_hand} vs {fd}");
            }
        }
    }
}
