//! The bus admittance matrix, sparse, in per unit on the system base.
//!
//! `I = Y V`, with currents injected into the buses positive. Each branch adds its 2x2 block
//! (see [`branch_admittance`]); shunts add to the diagonal.

use crate::model::{BusIdx, Grid, Outages};
use crate::{BranchIdx, Complex};

/// The four entries of one branch's admittance block, pu.
///
/// `[y_ff, y_ft, y_tf, y_tt]` so that `[I_f, I_t] = [[y_ff, y_ft], [y_tf, y_tt]] [V_f, V_t]`.
pub type BranchBlock = [Complex; 4];

/// The admittance block of a pi-model branch with an ideal transformer of complex ratio
/// `a = tap_ratio * e^(j phase_shift_rad)` at the from end.
///
/// `y_ff = (y_s + j b/2) / |a|^2`, `y_ft = -y_s / conj(a)`, `y_tf = -y_s / a`,
/// `y_tt = y_s + j b/2`, with `y_s = 1 / (r + j x)` (DOMAIN.md 1.3; the same model as the IEEE
/// CDF's, see `shared/reference/CDF_FORMAT.md`).
pub fn branch_admittance(
    r_pu: f64,
    x_pu: f64,
    b_pu: f64,
    tap_ratio: f64,
    phase_shift_rad: f64,
) -> BranchBlock {
    let y_s = Complex::new(1.0, 0.0) / Complex::new(r_pu, x_pu);
    let half_b = Complex::new(0.0, b_pu / 2.0);
    let a = Complex::from_polar(tap_ratio, phase_shift_rad);
    [
        (y_s + half_b) / (tap_ratio * tap_ratio),
        -y_s / a.conj(),
        -y_s / a,
        y_s + half_b,
    ]
}

/// A sparse bus admittance matrix in compressed-row form. Every row holds its diagonal, and
/// the pattern is structurally symmetric (a branch adds both off-diagonal entries), even when
/// the values are not (phase shifters).
#[derive(Clone, Debug)]
pub struct AdmittanceMatrix {
    /// Number of buses (rows and columns).
    pub n: usize,
    /// Row starts into `col_idx`/`values`, length `n + 1`.
    pub row_ptr: Vec<usize>,
    /// Column of each stored entry, sorted within each row.
    pub col_idx: Vec<usize>,
    /// Value of each stored entry, pu.
    pub values: Vec<Complex>,
    /// Position of each row's diagonal entry in `values`.
    pub diag_pos: Vec<usize>,
}

impl AdmittanceMatrix {
    /// Builds the matrix of `grid` with the in-service branches and shunts, less `outages`.
    pub fn build(grid: &Grid, outages: &Outages) -> AdmittanceMatrix {
        let n = grid.n_buses();
        let mut entries: Vec<(usize, usize, Complex)> =
            Vec::with_capacity(n + 4 * grid.branches.len());
        for i in 0..n {
            entries.push((i, i, Complex::new(0.0, 0.0)));
        }
        for (k, br) in grid.branches.iter().enumerate() {
            if !outages.branch_in_service(grid, BranchIdx(k as u32)) {
                continue;
            }
            let [ff, ft, tf, tt] =
                branch_admittance(br.r_pu, br.x_pu, br.b_pu, br.tap_ratio, br.phase_shift_rad);
            let (f, t) = (br.from.get(), br.to.get());
            entries.push((f, f, ff));
            entries.push((f, t, ft));
            entries.push((t, f, tf));
            entries.push((t, t, tt));
        }
        for sh in grid.shunts.iter().filter(|s| s.in_service) {
            let i = sh.bus.get();
            entries.push((i, i, Complex::new(sh.g_pu, sh.b_pu)));
        }
        Self::from_entries(n, entries)
    }

    /// Builds the matrix from (row, column, value) entries, summing duplicates.
    pub fn from_entries(n: usize, mut entries: Vec<(usize, usize, Complex)>) -> AdmittanceMatrix {
        entries.sort_by_key(|&(i, j, _)| (i, j));
        let mut row_ptr = vec![0usize; n + 1];
        let mut col_idx = Vec::with_capacity(entries.len());
        let mut values: Vec<Complex> = Vec::with_capacity(entries.len());
        let mut last: Option<(usize, usize)> = None;
        for (i, j, v) in entries {
            if last == Some((i, j)) {
                if let Some(x) = values.last_mut() {
                    *x += v;
                }
                continue;
            }
            last = Some((i, j));
            row_ptr[i + 1] += 1;
            col_idx.push(j);
            values.push(v);
        }
        for i in 0..n {
            row_ptr[i + 1] += row_ptr[i];
        }
        let diag_pos = (0..n)
            .map(|i| {
                (row_ptr[i]..row_ptr[i + 1])
                    .find(|&p| col_idx[p] == i)
                    .unwrap_or(row_ptr[i])
            })
            .collect();
        AdmittanceMatrix {
            n,
            row_ptr,
            col_idx,
            values,
            diag_pos,
        }
    }

    /// The entry at (`row`, `col`), zero if not stored.
    pub fn get(&self, row: BusIdx, col: BusIdx) -> Complex {
        let (i, j) = (row.get(), col.get());
        (self.row_ptr[i]..self.row_ptr[i + 1])
            .find(|&p| self.col_idx[p] == j)
            .map_or(Complex::new(0.0, 0.0), |p| self.values[p])
    }

    /// `I = Y V`, written into `current`.
    pub fn multiply(&self, v: &[Complex], current: &mut [Complex]) {
        for (i, out) in current.iter_mut().enumerate().take(self.n) {
            let row = self.row_ptr[i]..self.row_ptr[i + 1];
            let (mut re, mut im) = (0.0, 0.0);
            for (y, &j) in self.values[row.clone()].iter().zip(&self.col_idx[row]) {
                let x = v[j];
                re += y.re * x.re - y.im * x.im;
                im += y.re * x.im + y.im * x.re;
            }
            *out = Complex::new(re, im);
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn close(a: Complex, b: Complex) -> bool {
        (a - b).norm() < 1e-12
    }

    #[test]
    fn plain_line_block_is_symmetric_pi() {
        // Textbook pi model (DOMAIN.md 1.2-1.3): series y_s between the ends, j b/2 at each end.
        let [ff, ft, tf, tt] = branch_admittance(0.01, 0.1, 0.2, 1.0, 0.0);
        let y_s = Complex::new(1.0, 0.0) / Complex::new(0.01, 0.1);
        assert!(close(ff, y_s + Complex::new(0.0, 0.1)));
        assert!(close(tt, ff));
        assert!(close(ft, -y_s) && close(tf, -y_s));
    }

    #[test]
    fn tap_block_matches_ideal_transformer_in_series() {
        // Closed form: an ideal a:1 transformer at the from end followed by y_s. Current into the
        // series element from the to side: I_t = y_s (V_t - V_f / a); power balance through the
        // ideal transformer gives I_f = -conj(1/a) I_t.
        let (tap, shift) = (0.95_f64, 0.1_f64);
        let a = Complex::from_polar(tap, shift);
        let y_s = Complex::new(1.0, 0.0) / Complex::new(0.02, 0.2);
        let [ff, ft, tf, tt] = branch_admittance(0.02, 0.2, 0.0, tap, shift);
        let (vf, vt) = (
            Complex::from_polar(1.02, 0.05),
            Complex::from_polar(0.98, -0.1),
        );
        let i_t = y_s * (vt - vf / a);
        let i_f = -(Complex::new(1.0, 0.0) / a).conj() * i_t;
        assert!(close(ff * vf + ft * vt, i_f));
        assert!(close(tf * vf + tt * vt, i_t));
    }

    #[test]
    fn phase_shifter_makes_matrix_unsymmetric() {
        let [_, ft, tf, _] = branch_admittance(0.0, 0.1, 0.0, 1.0, 0.2);
        assert!(!close(ft, tf));
    }
}
