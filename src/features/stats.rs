//! Weighted streaming moments: Welford's update (1962) per value and the pairwise merge
//! of Chan, Golub & LeVeque (1979) across blocks and shards.

/// Count, weighted mean and variance, extremes and nulls of one column.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Moments {
    /// Non-null values seen (rows, whatever their weight).
    pub count: u64,
    /// Sum of the weights of the non-null values.
    pub weight: f64,
    /// Weighted mean.
    pub mean: f64,
    /// Weighted sum of squared deviations from the mean.
    pub m2: f64,
    /// Smallest value (of rows with positive weight).
    pub min: f64,
    /// Largest value (of rows with positive weight).
    pub max: f64,
    /// Null values seen (rows).
    pub nulls: u64,
    /// Sum of the weights of the null values.
    pub null_weight: f64,
}

impl Default for Moments {
    fn default() -> Self {
        Moments {
            count: 0,
            weight: 0.0,
            mean: 0.0,
            m2: 0.0,
            min: f64::INFINITY,
            max: f64::NEG_INFINITY,
            nulls: 0,
            null_weight: 0.0,
        }
    }
}

impl Moments {
    /// Adds one value of weight `w` (a row of weight 0 counts but moves nothing).
    #[inline]
    pub fn push(&mut self, x: f64, w: f64) {
        self.count += 1;
        if w <= 0.0 {
            return;
        }
        self.weight += w;
        let delta = x - self.mean;
        self.mean += delta * (w / self.weight);
        self.m2 += w * delta * (x - self.mean);
        self.min = self.min.min(x);
        self.max = self.max.max(x);
    }

    /// Counts a null of weight `w`.
    #[inline]
    pub fn push_null(&mut self, w: f64) {
        self.nulls += 1;
        self.null_weight += w.max(0.0);
    }

    /// Merges `other` into `self` (Chan et al.'s pairwise formula).
    pub fn merge(&mut self, other: &Moments) {
        self.count += other.count;
        self.nulls += other.nulls;
        self.null_weight += other.null_weight;
        if other.weight <= 0.0 {
            return;
        }
        if self.weight <= 0.0 {
            let (count, nulls, null_weight) = (self.count, self.nulls, self.null_weight);
            *self = *other;
            self.count = count;
            self.nulls = nulls;
            self.null_weight = null_weight;
            return;
        }
        let total = self.weight + other.weight;
        let delta = other.mean - self.mean;
        self.mean += delta * (other.weight / total);
        self.m2 += other.m2 + delta * delta * (self.weight * other.weight / total);
        self.weight = total;
        self.min = self.min.min(other.min);
        self.max = self.max.max(other.max);
    }

    /// Weighted population variance (ddof = 0).
    pub fn variance(&self) -> f64 {
        if self.weight > 0.0 {
            (self.m2 / self.weight).max(0.0)
        } else {
            0.0
        }
    }

    /// Weighted population standard deviation.
    pub fn std(&self) -> f64 {
        self.variance().sqrt()
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn merge_equals_one_stream_and_weights_equal_duplicates() {
        let xs = [1.0, 4.0, 2.5, -3.0, 10.0, 7.25, 0.5];
        let ws = [1.0, 2.0, 0.0, 3.0, 1.0, 2.0, 1.0];
        let mut whole = Moments::default();
        for (x, w) in xs.iter().zip(&ws) {
            whole.push(*x, *w);
        }
        let mut a = Moments::default();
        let mut b = Moments::default();
        for (i, (x, w)) in xs.iter().zip(&ws).enumerate() {
            if i < 3 {
                a.push(*x, *w)
            } else {
                b.push(*x, *w)
            }
        }
        a.merge(&b);
        assert!((a.mean - whole.mean).abs() < 1e-14);
        assert!((a.variance() - whole.variance()).abs() < 1e-12);
        let mut dup = Moments::default();
        for (x, w) in xs.iter().zip(&ws) {
            for _ in 0..(*w as usize) {
                dup.push(*x, 1.0);
            }
        }
        assert!((dup.mean - whole.mean).abs() < 1e-14);
        assert!((dup.variance() - whole.variance()).abs() < 1e-12);
        // Direct two-pass formula.
        let w: f64 = ws.iter().sum();
        let mean: f64 = xs.iter().zip(&ws).map(|(x, w)| x * w).sum::<f64>() / w;
        let var: f64 = xs
            .iter()
            .zip(&ws)
            .map(|(x, wi)| wi * (x - mean).powi(2))
            .sum::<f64>()
            / w;
        assert!((whole.mean - mean).abs() < 1e-14);
        assert!((whole.variance() - var).abs() < 1e-12);
        assert_eq!(whole.min, -3.0);
        assert_eq!(whole.max, 10.0);
    }
}
