//! The sparse half of the GLM kernels: margin contributions of a block's CSR entries and
//! the scatter of residuals into the sparse coordinates of the per-shard gradient.
//!
//! Both touch only the nonzeros of each row. The per-shard gradient buffer is the
//! shard's whole gradient vector (dense and sparse parts), so its memory is
//! `shards × dim × 8` bytes; [`gradient_memory`] states it and the fit driver bounds it.
//! Rows are visited in order and entries within a row in order, so the sums are the same
//! on every run (determinism invariant).

use crate::features::sparse::SparseRows;
use crate::objective::Layout;

/// Adds `Σ_k x[sparse(g) + index_k] · value_k` to the margin `z[g * n + i]` of every
/// row `first + i` (`i < n`) and group `g`.
pub fn add_margins(
    rows: &SparseRows,
    first: usize,
    n: usize,
    x: &[f64],
    layout: Layout,
    z: &mut [f64],
) {
    for g in 0..layout.groups {
        let xs = &x[layout.sparse_start(g)..layout.sparse_start(g) + layout.sparse];
        let zg = &mut z[g * n..(g + 1) * n];
        for (i, zi) in zg.iter_mut().enumerate() {
            let (index, value) = rows.row(first + i);
            let mut sum = 0.0;
            for (k, v) in index.iter().zip(value) {
                sum += xs[*k as usize] * v;
            }
            *zi += sum;
        }
    }
}

/// Adds `r[g * n + i] · value_k` to `grad[sparse(g) + index_k]` for every entry of every
/// row `first + i` (`i < n`; the residuals `r` are weighted; held-out rows carry zero
/// residuals).
pub fn add_gradient(
    rows: &SparseRows,
    first: usize,
    n: usize,
    r: &[f64],
    layout: Layout,
    grad: &mut [f64],
) {
    for g in 0..layout.groups {
        let start = layout.sparse_start(g);
        let gs = &mut grad[start..start + layout.sparse];
        for (i, ri) in r[g * n..(g + 1) * n].iter().enumerate() {
            if *ri == 0.0 {
                continue;
            }
            let (index, value) = rows.row(first + i);
            for (k, v) in index.iter().zip(value) {
                gs[*k as usize] += ri * v;
            }
        }
    }
}

/// Bytes of the per-shard gradient buffers of a pass: `shards × dim × 8`.
pub fn gradient_memory(shards: usize, layout: Layout) -> u64 {
    shards as u64 * layout.dim() as u64 * 8
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::objective::Loss;

    /// The same products computed by a dense matrix built in the test.
    #[test]
    fn margins_and_gradient_equal_the_dense_products() {
        let layout = Layout::new(Loss::Logistic, 0, 0, false).with_sparse(4);
        let mut rows = SparseRows::default();
        rows.push_row([(0, 1.0), (3, -1.0)].into_iter());
        rows.push_row([(2, 2.0), (2, 1.0)].into_iter());
        rows.push_row(std::iter::empty());
        let dense = [[1.0, 0.0, 0.0, -1.0], [0.0, 0.0, 3.0, 0.0], [0.0; 4]];
        let x = [0.5, 0.1, -0.2, 0.3, 0.7];
        let mut z = vec![x[0]; 3];
        add_margins(&rows, 0, rows.rows(), &x, layout, &mut z);
        for i in 0..3 {
            let want: f64 = x[0] + (0..4).map(|k| dense[i][k] * x[1 + k]).sum::<f64>();
            assert!((z[i] - want).abs() < 1e-15);
        }
        let r = [0.25, -0.5, 9.0];
        let mut g = vec![0.0; 5];
        add_gradient(&rows, 0, rows.rows(), &r, layout, &mut g);
        for k in 0..4 {
            let want: f64 = (0..3).map(|i| dense[i][k] * r[i]).sum();
            assert!((g[1 + k] - want).abs() < 1e-15);
        }
        assert_eq!(g[0], 0.0);
        assert_eq!(gradient_memory(2, layout), 2 * 5 * 8);
    }
}
