//! The sparse part of a [`Block`](crate::features::Block): rows in compressed sparse row
//! (CSR) form, as plain vectors of primitives (so a block cache can store them as one
//! section).
//!
//! Row `i` holds the entries `offsets[i]..offsets[i + 1]` of `index` (a sparse
//! coordinate: hash bucket, or vector column position) and `value` (the sign of a hashed
//! value, or the value of a sparse vector entry). Values are never standardized
//! (DESIGN §4 standardizes numeric columns only). Equal indices within a row may repeat
//! (a token list with a repeated token); the kernels add them up.

/// Rows of sparse entries, CSR.
#[derive(Debug, Clone, Default, PartialEq)]
pub struct SparseRows {
    /// Start of each row's entries, plus the end of the last (`rows + 1` values), or
    /// empty when the block has no sparse part.
    pub offsets: Vec<u64>,
    /// Sparse coordinate of each entry.
    pub index: Vec<u32>,
    /// Value of each entry.
    pub value: Vec<f64>,
}

impl SparseRows {
    /// No rows.
    pub fn clear(&mut self) {
        self.offsets.clear();
        self.index.clear();
        self.value.clear();
    }

    /// True when the block has no sparse part.
    #[inline]
    pub fn is_empty(&self) -> bool {
        self.offsets.is_empty()
    }

    /// Rows held.
    pub fn rows(&self) -> usize {
        self.offsets.len().saturating_sub(1)
    }

    /// Appends one row.
    pub fn push_row(&mut self, entries: impl Iterator<Item = (u32, f64)>) {
        if self.offsets.is_empty() {
            self.offsets.push(0);
        }
        for (i, v) in entries {
            self.index.push(i);
            self.value.push(v);
        }
        self.offsets.push(self.index.len() as u64);
    }

    /// Entries of row `i`: indices and values.
    #[inline]
    pub fn row(&self, i: usize) -> (&[u32], &[f64]) {
        let (a, b) = (self.offsets[i] as usize, self.offsets[i + 1] as usize);
        (&self.index[a..b], &self.value[a..b])
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn rows_round_trip() {
        let mut s = SparseRows::default();
        assert!(s.is_empty());
        s.push_row([(3, 1.0), (7, -1.0)].into_iter());
        s.push_row(std::iter::empty());
        s.push_row([(1, 2.5)].into_iter());
        assert_eq!(s.rows(), 3);
        assert_eq!(s.row(0), (&[3u32, 7][..], &[1.0, -1.0][..]));
        assert_eq!(s.row(1).0.len(), 0);
        assert_eq!(s.row(2), (&[1u32][..], &[2.5][..]));
        assert_eq!(s.offsets, vec![0, 2, 2, 3]);
    }
}
