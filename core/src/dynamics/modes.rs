//! Oscillation modes of sampled signals: frequency, damping and amplitude, by the matrix pencil
//! method applied to several signals at once.
//!
//! # Method
//! Every signal is modelled as a sum of damped exponentials shared by all signals,
//! `y_m[k] = sum_i c_mi z_i^k`, sampled every `dt`. Following Hua and Sarkar (matrix pencil,
//! 1990) in its multi-signal form:
//! 1. each signal fills a Hankel matrix of `N - L` rows and `L + 1` columns
//!    (`L = N / 3`); the matrices are stacked one above the other;
//! 2. the right singular vectors of the stack (the eigenvectors of its small Gram matrix) are
//!    kept whose singular values belong to components larger than
//!    [`PencilOptions::rank_amplitude`] (and above a numerical floor), at most
//!    [`PencilOptions::max_order`] of them;
//! 3. with `V1` and `V2` those vectors without their last and without their first row, the
//!    eigenvalues of `pinv(V1) V2` are the poles `z_i`; `s_i = ln(z_i) / dt` gives the decay
//!    rate `Re s`, the frequency `|Im s| / 2 pi` and the damping ratio `-Re s / |s|`;
//! 4. the coefficients of every signal follow by least squares on the poles (a real basis:
//!    `rho^k cos(k theta)`, `rho^k sin(k theta)` per pole pair), and a mode's amplitude in a
//!    signal is the largest envelope of its pair over the window.
//!
//! The method needs no initial guess, separates close modes that share a window, and works on
//! less than a period of a slow mode; noise below `rank_amplitude` is left out with the
//! singular values it owns. Amplitudes are in the signals' own units, so signals of different
//! kinds are best scaled to a common meaning first (the stability verdict divides each by its
//! amplitude floor).

use faer::linalg::solvers::SolveLstsq;
use faer::{Mat, Side};

use crate::Complex;

/// Settings of the mode estimate.
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct PencilOptions {
    /// Components whose amplitude in every signal stays below this (signal units) are taken
    /// as noise: their singular values are dropped before the poles are computed.
    pub rank_amplitude: f64,
    /// Largest model order (number of poles; a damped oscillation takes two).
    pub max_order: usize,
}

impl Default for PencilOptions {
    fn default() -> Self {
        PencilOptions {
            rank_amplitude: 1e-3,
            max_order: 24,
        }
    }
}

/// One mode found in the signals.
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct Mode {
    /// Frequency of the oscillation, Hz (0 for an aperiodic mode).
    pub frequency_hz: f64,
    /// Decay rate `Re s`, 1/s (negative: decaying).
    pub decay_per_s: f64,
    /// Damping ratio `-Re s / |s|`: 1 for an aperiodic decay, 0 for a sustained oscillation,
    /// negative for a growing one. Dimensionless.
    pub damping_ratio: f64,
    /// Largest amplitude of the mode in any signal over the window (envelope peak, signal
    /// units).
    pub amplitude: f64,
    /// The signal (index into the input) in which the mode is largest.
    pub signal: usize,
}

/// The modes of a set of signals.
#[derive(Clone, Debug, PartialEq)]
pub struct ModeEstimate {
    /// Every mode found, largest amplitude first (one entry per pole pair).
    pub modes: Vec<Mode>,
    /// Model order used (number of poles).
    pub order: usize,
    /// Root-mean-square misfit of the model over every signal, relative to the signals'
    /// root-mean-square deviation from their means (0: exact). Dimensionless.
    pub relative_residual: f64,
}

/// Estimates the modes of `signals` (each of the same length, sampled every `dt_s`), or `None`
/// if they cannot be analysed: fewer than 8 samples, unequal lengths, a value that is not
/// finite, or a decomposition that failed.
pub fn estimate_modes(
    signals: &[Vec<f64>],
    dt_s: f64,
    options: &PencilOptions,
) -> Option<ModeEstimate> {
    let n = signals.first()?.len();
    if n < 8
        || !(dt_s > 0.0 && dt_s.is_finite())
        || signals
            .iter()
            .any(|s| s.len() != n || s.iter().any(|v| !v.is_finite()))
    {
        return None;
    }
    // Deviation from the means, for the relative residual. The signals themselves are fitted
    // as given: an offset is one more pole at z = 1 (removing the mean instead would leave a
    // constant that a slow trend cannot absorb).
    let spread = (signals
        .iter()
        .map(|s| {
            let mean = s.iter().sum::<f64>() / n as f64;
            s.iter().map(|v| (v - mean).powi(2)).sum::<f64>()
        })
        .sum::<f64>()
        / (n * signals.len()) as f64)
        .sqrt();
    let quiet = ModeEstimate {
        modes: Vec::new(),
        order: 0,
        relative_residual: 0.0,
    };
    if spread == 0.0 {
        return Some(quiet);
    }
    let l = n / 3;
    let rows = n - l;
    // The right singular vectors of the stacked Hankel matrix H are the eigenvectors of
    // G = H^T H, and its singular values the roots of G's eigenvalues. G is small
    // ((l + 1) x (l + 1)) and, H being Hankel, each signal adds to it along diagonals:
    // G[a + 1][b + 1] = G[a][b] + y[rows + a] y[rows + b] - y[a] y[b].
    let cols = l + 1;
    let mut gram = Mat::<f64>::zeros(cols, cols);
    for y in signals {
        for b in 0..cols {
            let mut g: f64 = (0..rows).map(|i| y[i] * y[i + b]).sum();
            gram[(b, 0)] += g;
            for a in 1..cols - b {
                g += y[rows + a - 1] * y[rows + a - 1 + b] - y[a - 1] * y[a - 1 + b];
                gram[(a + b, a)] += g;
            }
        }
    }
    let eigen = gram.self_adjoint_eigen(Side::Lower).ok()?;
    // Eigenvalues come in nondecreasing order: the largest singular values last.
    let by_size: Vec<usize> = (0..cols).rev().collect();
    let sigma: Vec<f64> = by_size
        .iter()
        .map(|&k| eigen.S().column_vector()[k].max(0.0).sqrt())
        .collect();
    // A sinusoid of amplitude a in one signal owns two singular values of about
    // a * sqrt(rows * (l + 1) / 4); below 1e-7 of the largest, the values squared lie in the
    // rounding of G.
    let floor =
        (options.rank_amplitude * (rows as f64 * cols as f64 / 4.0).sqrt()).max(sigma[0] * 1e-7);
    let order = sigma
        .iter()
        .take_while(|&&s| s > floor)
        .count()
        .min(options.max_order)
        .min(l);
    if order == 0 {
        return Some(quiet);
    }
    let u = eigen.U();
    let v = Mat::<f64>::from_fn(cols, order, |i, j| u[(i, by_size[j])]);
    let v1 = Mat::<f64>::from_fn(l, order, |i, j| v[(i, j)]);
    let v2 = Mat::<f64>::from_fn(l, order, |i, j| v[(i + 1, j)]);
    let pencil = v1.qr().solve_lstsq(&v2);
    let poles = pencil.eigenvalues().ok()?;
    modes_of(signals, &poles, dt_s, spread)
}

/// Fits the signals on the poles and turns each pole (pair) into a [`Mode`].
fn modes_of(
    signals: &[Vec<f64>],
    poles: &[Complex],
    dt_s: f64,
    spread: f64,
) -> Option<ModeEstimate> {
    let n = signals[0].len();
    // One representative per conjugate pair (upper half plane), and the real poles; poles at
    // the origin carry nothing that lasts a sample.
    let mut kept: Vec<Complex> = poles
        .iter()
        .copied()
        .filter(|z| z.norm() > 1e-12 && z.im >= -1e-12)
        .collect();
    kept.sort_by(|a, b| a.arg().total_cmp(&b.arg()));
    // Real basis: two columns per pair, one per real pole.
    let mut columns: Vec<(usize, bool)> = Vec::new();
    for (k, z) in kept.iter().enumerate() {
        columns.push((k, false));
        if z.im > 1e-12 {
            columns.push((k, true));
        }
    }
    let basis = Mat::<f64>::from_fn(n, columns.len(), |t, c| {
        let (k, sine) = columns[c];
        let zt = kept[k].powu(t as u32);
        if sine { zt.im } else { zt.re }
    });
    let rhs = Mat::<f64>::from_fn(n, signals.len(), |t, m| signals[m][t]);
    let coefficients = basis.qr().solve_lstsq(&rhs);
    let mut misfit = 0.0;
    for m in 0..signals.len() {
        for t in 0..n {
            let fitted: f64 = (0..columns.len())
                .map(|c| basis[(t, c)] * coefficients[(c, m)])
                .sum();
            misfit += (signals[m][t] - fitted).powi(2);
        }
    }
    let relative_residual = (misfit / (n * signals.len()) as f64).sqrt() / spread;
    let mut modes = Vec::with_capacity(kept.len());
    let mut c = 0;
    for z in &kept {
        let pair = z.im > 1e-12;
        let rho = z.norm();
        let envelope = rho.powi(n as i32 - 1).max(1.0);
        let (mut amplitude, mut signal) = (0.0_f64, 0);
        for m in 0..signals.len() {
            let a = if pair {
                coefficients[(c, m)].hypot(coefficients[(c + 1, m)])
            } else {
                coefficients[(c, m)].abs()
            };
            if a * envelope > amplitude {
                (amplitude, signal) = (a * envelope, m);
            }
        }
        c += if pair { 2 } else { 1 };
        let s = z.ln() / dt_s;
        let frequency_hz = if pair {
            s.im / (2.0 * std::f64::consts::PI)
        } else if z.re < 0.0 {
            // A negative real pole alternates every sample: the Nyquist frequency.
            0.5 / dt_s
        } else {
            0.0
        };
        let magnitude = (s.re * s.re + (2.0 * std::f64::consts::PI * frequency_hz).powi(2)).sqrt();
        modes.push(Mode {
            frequency_hz,
            decay_per_s: s.re,
            damping_ratio: if magnitude > 0.0 {
                -s.re / magnitude
            } else {
                1.0
            },
            amplitude,
            signal,
        });
    }
    modes.sort_by(|a, b| b.amplitude.total_cmp(&a.amplitude));
    Some(ModeEstimate {
        order: poles.len(),
        modes,
        relative_residual,
    })
}

#[cfg(test)]
mod tests {
    use super::*;
    use std::f64::consts::PI;

    /// A damped cosine of frequency `f_hz` and damping ratio `zeta` (closed form:
    /// `a e^(-zeta wn t) cos(wd t + phase)`, `wd = 2 pi f`, `wn = wd / sqrt(1 - zeta^2)`).
    fn ringdown(a: f64, f_hz: f64, zeta: f64, phase: f64, t: f64) -> f64 {
        let wd = 2.0 * PI * f_hz;
        let wn = wd / (1.0 - zeta * zeta).sqrt();
        a * (-zeta * wn * t).exp() * (wd * t + phase).cos()
    }

    /// Deterministic noise in [-1, 1] (a 64-bit linear congruential generator; no outside
    /// source needed for a test signal).
    fn noise(state: &mut u64) -> f64 {
        *state = state
            .wrapping_mul(6364136223846793005)
            .wrapping_add(1442695040888963407);
        ((*state >> 11) as f64 / (1u64 << 53) as f64) * 2.0 - 1.0
    }

    fn closest(estimate: &ModeEstimate, f_hz: f64) -> Mode {
        *estimate
            .modes
            .iter()
            .min_by(|a, b| {
                (a.frequency_hz - f_hz)
                    .abs()
                    .total_cmp(&(b.frequency_hz - f_hz).abs())
            })
            .unwrap()
    }

    #[test]
    fn one_clean_mode_is_found_exactly() {
        // Closed form: a 0.95-Hz oscillation with damping ratio 0.006 over 5 s at 20 samples/s.
        let dt = 0.05;
        let y: Vec<f64> = (0..101)
            .map(|k| 1.0 + ringdown(0.09, 0.95, 0.006, 0.3, k as f64 * dt))
            .collect();
        let e = estimate_modes(&[y], dt, &PencilOptions::default()).unwrap();
        let m = closest(&e, 0.95);
        assert!((m.frequency_hz - 0.95).abs() < 1e-6, "{m:?}");
        assert!((m.damping_ratio - 0.006).abs() < 1e-6, "{m:?}");
        assert!((m.amplitude - 0.09).abs() < 1e-3, "{m:?}");
        assert!(e.relative_residual < 1e-6, "{e:?}");
    }

    #[test]
    fn several_modes_with_noise_in_several_signals() {
        // Check of the issue: known frequencies and damping ratios (closed form), several modes
        // and noise; frequency within 1 %, damping ratio within 0.005. An inter-area mode
        // (0.45 Hz, 4 %), a local mode (1.3 Hz, 8 %) and a poorly damped one (0.95 Hz,
        // 1 %), mixed differently in four signals, a slow aperiodic drift, and uniform noise of
        // 2 % of the largest amplitude.
        let dt = 0.05;
        let modes = [(0.45, 0.04), (1.3, 0.08), (0.95, 0.01)];
        let mix = [
            [1.0, 0.3, 0.5],
            [-0.8, 0.6, 0.2],
            [0.2, -1.0, 0.7],
            [0.5, 0.1, -0.9],
        ];
        let mut state = 7;
        let signals: Vec<Vec<f64>> = mix
            .iter()
            .enumerate()
            .map(|(m, weights)| {
                (0..101)
                    .map(|k| {
                        let t = k as f64 * dt;
                        let oscillations: f64 = modes
                            .iter()
                            .zip(weights)
                            .map(|(&(f, z), w)| ringdown(*w, f, z, m as f64, t))
                            .sum();
                        oscillations + 0.3 * (-t / 4.0).exp() + 0.02 * noise(&mut state)
                    })
                    .collect()
            })
            .collect();
        let options = PencilOptions {
            rank_amplitude: 0.1,
            ..PencilOptions::default()
        };
        let e = estimate_modes(&signals, dt, &options).unwrap();
        for (f, z) in modes {
            let m = closest(&e, f);
            eprintln!(
                "mode {f} Hz, zeta {z}: found {:.4} Hz, zeta {:.4}, amplitude {:.3}",
                m.frequency_hz, m.damping_ratio, m.amplitude
            );
            assert!(((m.frequency_hz - f) / f).abs() < 0.01, "{m:?}");
            assert!((m.damping_ratio - z).abs() < 0.005, "{m:?}");
        }
    }

    #[test]
    fn a_growing_oscillation_has_negative_damping() {
        let dt = 0.05;
        let y: Vec<f64> = (0..101)
            .map(|k| ringdown(0.02, 0.6, -0.02, 0.0, k as f64 * dt))
            .collect();
        let e = estimate_modes(&[y], dt, &PencilOptions::default()).unwrap();
        let m = closest(&e, 0.6);
        assert!((m.damping_ratio + 0.02).abs() < 1e-6, "{m:?}");
        // The envelope peaks at the end of the window: 0.02 e^(0.02 wn 5).
        let wn = 2.0 * PI * 0.6 / (1.0f64 - 0.0004).sqrt();
        assert!((m.amplitude - 0.02 * (0.02 * wn * 5.0).exp()).abs() < 1e-4);
    }

    #[test]
    fn flat_or_invalid_signals() {
        let flat = vec![1.0; 50];
        let e = estimate_modes(&[flat], 0.05, &PencilOptions::default()).unwrap();
        assert!(e.modes.is_empty());
        assert!(estimate_modes(&[vec![1.0; 5]], 0.05, &PencilOptions::default()).is_none());
        let mut bad = vec![0.0; 50];
        bad[3] = f64::NAN;
        assert!(estimate_modes(&[bad], 0.05, &PencilOptions::default()).is_none());
        assert!(
            estimate_modes(&[vec![0.0; 50], vec![0.0; 40]], 0.05, &Default::default()).is_none()
        );
    }
}
