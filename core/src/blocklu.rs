//! A sparse LU in 2x2 blocks, one block row and column per bus, for the power-flow Jacobian.
//!
//! The power-flow Jacobian, written with two unknowns (angle, magnitude) and two equations
//! (P, Q) per bus, has the sparsity of the bus graph. This solver orders the buses once by
//! approximate minimum degree (faer's AMD), computes the fill once by symbolic elimination, and
//! then refactorises the numbers as often as needed with no further analysis or allocation.
//! Pivoting is by block: each bus's 2x2 diagonal block is inverted, with no row exchanges
//! between buses. That is the classic scheme of power-flow codes (the Jacobian's diagonal blocks
//! dominate on any sound case); a singular pivot block is reported, never hidden.
//!
//! Rows and columns of unknowns that a bus does not have (the magnitude of a PV bus, both of a
//! reference or dead bus) are kept as identity rows with zero right-hand side, so the pattern
//! stays the same when buses switch between PV and PQ.

use faer::dyn_stack::{MemBuffer, MemStack};
use faer::sparse::SymbolicSparseColMatRef;
use faer::sparse::linalg::amd;

/// A 2x2 block, row-major: `[a00, a01, a10, a11]`.
pub(crate) type Block = [f64; 4];

fn mul(a: &Block, b: &Block) -> Block {
    [
        a[0] * b[0] + a[1] * b[2],
        a[0] * b[1] + a[1] * b[3],
        a[2] * b[0] + a[3] * b[2],
        a[2] * b[1] + a[3] * b[3],
    ]
}

fn sub_assign(a: &mut Block, b: &Block) {
    for (x, y) in a.iter_mut().zip(b) {
        *x -= y;
    }
}

fn inverse(a: &Block) -> Option<Block> {
    let det = a[0] * a[3] - a[1] * a[2];
    let scale = a.iter().fold(0.0_f64, |m, x| m.max(x.abs()));
    if !det.is_finite() || det.abs() <= 1e-14 * scale * scale || scale == 0.0 {
        return None;
    }
    Some([a[3] / det, -a[1] / det, -a[2] / det, a[0] / det])
}

fn apply(a: &Block, x: [f64; 2]) -> [f64; 2] {
    [a[0] * x[0] + a[1] * x[1], a[2] * x[0] + a[3] * x[1]]
}

/// Where a matrix entry (bus row, bus column) is stored.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub(crate) enum Slot {
    /// The diagonal block of a bus (indexed by elimination position).
    Diag(usize),
    /// An upper block (row eliminated before column), index into the block arrays.
    Upper(usize),
    /// A lower block (row eliminated after column), index into the block arrays.
    Lower(usize),
}

/// Block LU factors with a fixed, pre-analysed structure.
#[derive(Clone, Debug)]
pub(crate) struct BlockLu {
    n: usize,
    /// `position[bus]`: elimination step of each bus.
    position: Vec<usize>,
    /// `order[step]`: the bus eliminated at each step.
    order: Vec<usize>,
    /// For each step `k`, the later steps coupled to it (after fill), ascending: `up_idx[up_ptr[k]..up_ptr[k+1]]`.
    up_ptr: Vec<usize>,
    up_idx: Vec<usize>,
    /// Diagonal blocks, by step; after `factor`, their inverses.
    diag: Vec<Block>,
    /// `upper[s]`: block (row k, column j) for the s-th entry of step k's list.
    upper: Vec<Block>,
    /// `lower[s]`: block (row j, column k) for the same entry; after `factor`, times the inverse pivot.
    lower: Vec<Block>,
    /// Scratch: slot of each later step in the current row's list.
    work: Vec<usize>,
}

/// A pivot block that could not be inverted: the bus (index) where elimination broke down.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub(crate) struct SingularBlock(pub(crate) usize);

impl BlockLu {
    /// Analyses the structure of an `n`-bus matrix whose off-diagonal blocks sit where the
    /// compressed rows (`row_ptr`, `col_idx`) say; the pattern must be structurally symmetric.
    pub(crate) fn new(n: usize, row_ptr: &[usize], col_idx: &[usize]) -> BlockLu {
        let (order, position) = amd_order(n, row_ptr, col_idx);
        // Symbolic elimination: the later neighbours of each step, with fill passed to the
        // parent in the elimination tree (the smallest later neighbour).
        let mut later: Vec<Vec<usize>> = vec![Vec::new(); n];
        for i in 0..n {
            let pi = position[i];
            for p in row_ptr[i]..row_ptr[i + 1] {
                let pj = position[col_idx[p]];
                if pj > pi {
                    later[pi].push(pj);
                }
            }
        }
        let mut up_ptr = vec![0; n + 1];
        let mut up_idx = Vec::new();
        for k in 0..n {
            let mut list = std::mem::take(&mut later[k]);
            list.sort_unstable();
            list.dedup();
            if let Some((&parent, rest)) = list.split_first() {
                later[parent].extend_from_slice(rest);
            }
            up_idx.extend_from_slice(&list);
            up_ptr[k + 1] = up_idx.len();
        }
        let nnz = up_idx.len();
        BlockLu {
            n,
            position,
            order,
            up_ptr,
            up_idx,
            diag: vec![[0.0; 4]; n],
            upper: vec![[0.0; 4]; nnz],
            lower: vec![[0.0; 4]; nnz],
            work: vec![usize::MAX; n],
        }
    }

    /// Number of stored off-diagonal blocks (each side), after fill.
    #[cfg(test)]
    pub(crate) fn n_offdiagonal(&self) -> usize {
        self.up_idx.len()
    }

    /// Where the block (row `bus_row`, column `bus_col`) lives. Panics if it is not in the
    /// structure (a programming error: the caller passes the analysed pattern's entries).
    pub(crate) fn slot(&self, bus_row: usize, bus_col: usize) -> Slot {
        let (r, c) = (self.position[bus_row], self.position[bus_col]);
        if r == c {
            return Slot::Diag(r);
        }
        let (k, j) = if r < c { (r, c) } else { (c, r) };
        let list = &self.up_idx[self.up_ptr[k]..self.up_ptr[k + 1]];
        let s = self.up_ptr[k]
            + list.binary_search(&j).unwrap_or_else(|_| {
                panic!("block ({bus_row}, {bus_col}) is not in the analysed structure")
            });
        if r < c {
            Slot::Upper(s)
        } else {
            Slot::Lower(s)
        }
    }

    /// Sets every stored block to zero (fill included).
    pub(crate) fn clear(&mut self) {
        self.diag.fill([0.0; 4]);
        self.upper.fill([0.0; 4]);
        self.lower.fill([0.0; 4]);
    }

    /// Writes a block into its slot.
    pub(crate) fn set(&mut self, slot: Slot, block: Block) {
        match slot {
            Slot::Diag(k) => self.diag[k] = block,
            Slot::Upper(s) => self.upper[s] = block,
            Slot::Lower(s) => self.lower[s] = block,
        }
    }

    /// Adds a block into its slot.
    pub(crate) fn add(&mut self, slot: Slot, block: Block) {
        let target = match slot {
            Slot::Diag(k) => &mut self.diag[k],
            Slot::Upper(s) => &mut self.upper[s],
            Slot::Lower(s) => &mut self.lower[s],
        };
        for (t, b) in target.iter_mut().zip(block) {
            *t += b;
        }
    }

    /// Factorises in place (right-looking block elimination).
    pub(crate) fn factor(&mut self) -> Result<(), SingularBlock> {
        for k in 0..self.n {
            let inv = inverse(&self.diag[k]).ok_or(SingularBlock(self.order[k]))?;
            self.diag[k] = inv;
            let (start, end) = (self.up_ptr[k], self.up_ptr[k + 1]);
            for a in start..end {
                self.lower[a] = mul(&self.lower[a], &inv);
            }
            for a in start..end {
                let j = self.up_idx[a];
                // Diagonal of j.
                let update = mul(&self.lower[a], &self.upper[a]);
                sub_assign(&mut self.diag[j], &update);
                if a + 1 == end {
                    continue;
                }
                // Scatter row j's list, then update the pairs (j, m) with m later than j.
                for s in self.up_ptr[j]..self.up_ptr[j + 1] {
                    self.work[self.up_idx[s]] = s;
                }
                for b in a + 1..end {
                    let m = self.up_idx[b];
                    let s = self.work[m];
                    debug_assert!(s != usize::MAX, "fill missing for ({j}, {m})");
                    let up = mul(&self.lower[a], &self.upper[b]);
                    sub_assign(&mut self.upper[s], &up);
                    let low = mul(&self.lower[b], &self.upper[a]);
                    sub_assign(&mut self.lower[s], &low);
                }
                for s in self.up_ptr[j]..self.up_ptr[j + 1] {
                    self.work[self.up_idx[s]] = usize::MAX;
                }
            }
        }
        Ok(())
    }

    /// Solves `A x = b` in place; `rhs` holds two entries per bus, in bus order.
    pub(crate) fn solve_in_place(&self, rhs: &mut [f64], scratch: &mut Vec<[f64; 2]>) {
        scratch.clear();
        scratch.extend(
            self.order
                .iter()
                .map(|&bus| [rhs[2 * bus], rhs[2 * bus + 1]]),
        );
        let y = scratch;
        // Forward: unit block-lower.
        for (k, span) in self.up_ptr.windows(2).enumerate() {
            let yk = y[k];
            let (lower, idx) = (
                &self.lower[span[0]..span[1]],
                &self.up_idx[span[0]..span[1]],
            );
            for (block, &j) in lower.iter().zip(idx) {
                let d = apply(block, yk);
                y[j][0] -= d[0];
                y[j][1] -= d[1];
            }
        }
        // Backward: block-upper with the inverted pivots.
        for (k, span) in self.up_ptr.windows(2).enumerate().rev() {
            let mut acc = y[k];
            let (upper, idx) = (
                &self.upper[span[0]..span[1]],
                &self.up_idx[span[0]..span[1]],
            );
            for (block, &j) in upper.iter().zip(idx) {
                let d = apply(block, y[j]);
                acc[0] -= d[0];
                acc[1] -= d[1];
            }
            y[k] = apply(&self.diag[k], acc);
        }
        for (k, &bus) in self.order.iter().enumerate() {
            rhs[2 * bus] = y[k][0];
            rhs[2 * bus + 1] = y[k][1];
        }
    }
}

/// Approximate-minimum-degree order of the buses; falls back to the natural order if the
/// ordering routine fails (it only can on memory exhaustion).
fn amd_order(n: usize, row_ptr: &[usize], col_idx: &[usize]) -> (Vec<usize>, Vec<usize>) {
    let natural = || ((0..n).collect::<Vec<_>>(), (0..n).collect::<Vec<_>>());
    if n == 0 {
        return natural();
    }
    let mut perm = vec![0usize; n];
    let mut perm_inv = vec![0usize; n];
    let view = SymbolicSparseColMatRef::new_checked(n, n, row_ptr, None, col_idx);
    let req = amd::order_maybe_unsorted_scratch::<usize>(n, col_idx.len());
    let Ok(mut buffer) = MemBuffer::try_new(req) else {
        return natural();
    };
    match amd::order_maybe_unsorted(
        &mut perm,
        &mut perm_inv,
        view,
        amd::Control::default(),
        MemStack::new(&mut buffer),
    ) {
        Ok(_) => (perm, perm_inv),
        Err(_) => natural(),
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Builds a random structurally symmetric block matrix on a ring-with-chords pattern,
    /// factors it, and checks `A x = b` by multiplying back (a self-consistency identity).
    #[test]
    fn solves_a_block_system_exactly() {
        let n = 40;
        let mut edges = Vec::new();
        for i in 0..n {
            edges.push((i, (i + 1) % n));
            if i % 3 == 0 {
                edges.push((i, (i + 7) % n));
            }
        }
        let mut rows: Vec<Vec<usize>> = (0..n).map(|i| vec![i]).collect();
        for &(a, b) in &edges {
            rows[a].push(b);
            rows[b].push(a);
        }
        let mut row_ptr = vec![0];
        let mut col_idx = Vec::new();
        for r in &mut rows {
            r.sort_unstable();
            r.dedup();
            col_idx.extend_from_slice(r);
            row_ptr.push(col_idx.len());
        }
        let mut lu = BlockLu::new(n, &row_ptr, &col_idx);
        let mut seed = 1u64;
        let mut rand = || {
            seed = seed
                .wrapping_mul(6364136223846793005)
                .wrapping_add(1442695040888963407);
            ((seed >> 33) as f64 / (1u64 << 31) as f64) - 0.5
        };
        let mut dense = vec![vec![0.0; 2 * n]; 2 * n];
        for i in 0..n {
            for p in row_ptr[i]..row_ptr[i + 1] {
                let j = col_idx[p];
                let mut block = [rand(), rand(), rand(), rand()];
                if i == j {
                    block[0] += 8.0;
                    block[3] += 8.0;
                }
                lu.set(lu.slot(i, j), block);
                for (q, v) in block.iter().enumerate() {
                    dense[2 * i + q / 2][2 * j + q % 2] = *v;
                }
            }
        }
        lu.factor().unwrap();
        let b: Vec<f64> = (0..2 * n).map(|_| rand()).collect();
        let mut x = b.clone();
        lu.solve_in_place(&mut x, &mut Vec::new());
        for r in 0..2 * n {
            let ax: f64 = (0..2 * n).map(|c| dense[r][c] * x[c]).sum();
            assert!((ax - b[r]).abs() < 1e-12, "row {r}: {ax} vs {}", b[r]);
        }
        assert!(lu.n_offdiagonal() >= edges.len());
    }

    #[test]
    fn singular_pivot_is_reported() {
        let row_ptr = [0, 1];
        let col_idx = [0];
        let mut lu = BlockLu::new(1, &row_ptr, &col_idx);
        lu.set(lu.slot(0, 0), [1.0, 2.0, 2.0, 4.0]);
        assert_eq!(lu.factor(), Err(SingularBlock(0)));
    }
}
