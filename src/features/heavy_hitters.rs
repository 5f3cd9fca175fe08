//! A bounded summary of the most frequent values of a column: the Misra–Gries sketch
//! (J. Misra and D. Gries, "Finding repeated elements", Science of Computer Programming
//! 2(2), 1982), with the merge of Agarwal et al. ("Mergeable summaries", PODS 2012) so
//! that shards can be summed in order.
//!
//! With `k` counters, every value whose weight is more than `total / (k + 1)` is kept,
//! and a kept count underestimates the true weight by at most `total / (k + 1)`.
//! The result depends only on the values in data order and on the shard cut, not on
//! threads (shards are merged in shard order; ties are broken by the value's bytes).

use std::collections::HashMap;

/// Counters kept per hashed feature by default.
pub const DEFAULT_COUNTERS: usize = 512;

/// A Misra–Gries sketch over byte-string values.
#[derive(Debug, Clone, PartialEq)]
pub struct Sketch {
    k: usize,
    counts: HashMap<Vec<u8>, u64>,
    /// Values offered, with multiplicity.
    pub total: u64,
}

impl Sketch {
    /// A sketch with `k` counters.
    pub fn new(k: usize) -> Sketch {
        Sketch {
            k: k.max(1),
            counts: HashMap::with_capacity(k + 1),
            total: 0,
        }
    }

    /// Offers one occurrence of `value`.
    pub fn offer(&mut self, value: &[u8]) {
        self.total += 1;
        if let Some(c) = self.counts.get_mut(value) {
            *c += 1;
            return;
        }
        self.counts.insert(value.to_vec(), 1);
        // Up to 2k counters are kept between reductions, so a reduction (O(k log k))
        // comes once per k new values at most.
        if self.counts.len() > 2 * self.k {
            self.reduce();
        }
    }

    /// Subtracts the (k+1)-th largest count from every counter and keeps the positive
    /// ones (at most k remain). Each reduction by c removes c from at least k+1
    /// counters, so the total undercount stays at most total/(k+1).
    fn reduce(&mut self) {
        if self.counts.len() <= self.k {
            return;
        }
        let mut counts: Vec<u64> = self.counts.values().copied().collect();
        counts.sort_unstable_by(|a, b| b.cmp(a));
        let cut = counts[self.k];
        self.counts.retain(|_, c| {
            *c = c.saturating_sub(cut);
            *c > 0
        });
    }

    /// Adds `other` (of the same `k`) into `self`: sum the counters, then subtract the
    /// (k+1)-th largest count and keep the positive ones.
    pub fn merge(&mut self, other: &Sketch) {
        self.total += other.total;
        for (v, c) in &other.counts {
            *self.counts.entry(v.clone()).or_insert(0) += c;
        }
        self.reduce();
    }

    /// Kept values with their (lower-bound) counts, most frequent first, ties by bytes.
    pub fn top(&self) -> Vec<(Vec<u8>, u64)> {
        let mut s = self.clone();
        s.reduce();
        let mut v: Vec<(Vec<u8>, u64)> = s.counts.iter().map(|(k, c)| (k.clone(), *c)).collect();
        v.sort_by(|a, b| b.1.cmp(&a.1).then_with(|| a.0.cmp(&b.0)));
        v
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Exact counts computed in the test are the outside reference: the sketch keeps
    /// every value above total/(k+1) and undercounts by at most total/(k+1)
    /// (Misra & Gries 1982, Theorem; Agarwal et al. 2012 for merged sketches).
    #[test]
    fn keeps_the_frequent_values_within_the_bound() {
        let mut stream = Vec::new();
        for i in 0..10_000u32 {
            // Value 0 is 30%, 1 is 15%, the rest spread over 500 values.
            let v = match i % 20 {
                0..=5 => 0,
                6..=8 => 1,
                _ => 2 + (i.wrapping_mul(2654435761) % 500),
            };
            stream.push(v.to_string().into_bytes());
        }
        let mut exact: HashMap<Vec<u8>, u64> = HashMap::new();
        for v in &stream {
            *exact.entry(v.clone()).or_insert(0) += 1;
        }
        let k = 16;
        let mut whole = Sketch::new(k);
        for v in &stream {
            whole.offer(v);
        }
        let mut a = Sketch::new(k);
        let mut b = Sketch::new(k);
        for v in &stream[..3000] {
            a.offer(v);
        }
        for v in &stream[3000..] {
            b.offer(v);
        }
        a.merge(&b);
        let bound = stream.len() as u64 / (k as u64 + 1);
        for s in [&whole, &a] {
            let top = s.top();
            assert_eq!(top[0].0, b"0".to_vec());
            assert_eq!(top[1].0, b"1".to_vec());
            for (v, c) in &top {
                let e = exact[v];
                assert!(*c <= e && e - c <= bound, "{c} vs {e}");
            }
            for (v, e) in &exact {
                if *e > bound {
                    assert!(top.iter().any(|(t, _)| t == v));
                }
            }
            assert_eq!(s.total, stream.len() as u64);
        }
    }
}
