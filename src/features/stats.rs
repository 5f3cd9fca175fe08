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

/// A feature column against the target, enough to give the gradient of the starting
/// point of a fit (every coefficient 0, so every row has the same margin) without a pass
/// of its own: over the non-null values, the weighted means of the value and the target
/// and their co-moment `Σ w (x − x̄)(y − ȳ)`, updated one value at a time and merged by
/// the pairwise formulas of Chan, Golub and LeVeque (like [`Moments`]) on the values less
/// a shift (the first value seen), so that neither a target nor a feature far from 0
/// costs precision; over the null values, the weight and mean of the target.
#[derive(Debug, Clone, Copy, PartialEq, Default)]
pub struct Comoments {
    /// Subtracted from every value before it is summed (the first value seen).
    pub shift: f64,
    /// Sum of the weights of the non-null values.
    pub weight: f64,
    /// Weighted mean of the non-null values less `shift`.
    pub mean_x: f64,
    /// Weighted mean of the target over the rows with a non-null value.
    pub mean_y: f64,
    /// `Σ w (x − x̄)(y − ȳ)` over the non-null values.
    pub comoment: f64,
    /// Sum of the weights of the null values.
    pub null_weight: f64,
    /// Weighted mean of the target over the rows with a null value.
    pub null_mean_y: f64,
}

impl Comoments {
    /// Adds a non-null value `x` of a row with target `y` and weight `w`.
    #[inline]
    pub fn push(&mut self, x: f64, y: f64, w: f64) {
        if w <= 0.0 {
            return;
        }
        if self.weight <= 0.0 {
            self.shift = x;
        }
        self.weight += w;
        let share = w / self.weight;
        let dx = (x - self.shift) - self.mean_x;
        self.mean_x += dx * share;
        self.mean_y += (y - self.mean_y) * share;
        self.comoment += w * dx * (y - self.mean_y);
    }

    /// Adds a null value of a row with target `y` and weight `w`.
    #[inline]
    pub fn push_null(&mut self, y: f64, w: f64) {
        if w > 0.0 {
            self.null_weight += w;
            self.null_mean_y += (y - self.null_mean_y) * (w / self.null_weight);
        }
    }

    /// The weighted mean of the non-null values less `c`.
    pub fn mean_less(&self, c: f64) -> f64 {
        (self.shift - c) + self.mean_x
    }

    /// Merges `other` into `self`.
    pub fn merge(&mut self, other: &Comoments) {
        if other.null_weight > 0.0 {
            let total = self.null_weight + other.null_weight;
            self.null_mean_y +=
                (other.null_mean_y - self.null_mean_y) * (other.null_weight / total);
            self.null_weight = total;
        }
        if other.weight <= 0.0 {
            return;
        }
        if self.weight <= 0.0 {
            let (null_weight, null_mean_y) = (self.null_weight, self.null_mean_y);
            *self = *other;
            self.null_weight = null_weight;
            self.null_mean_y = null_mean_y;
            return;
        }
        let total = self.weight + other.weight;
        let dx = (other.shift - self.shift) + (other.mean_x - self.mean_x);
        let dy = other.mean_y - self.mean_y;
        self.comoment += other.comoment + dx * dy * (self.weight * other.weight / total);
        self.mean_x += dx * (other.weight / total);
        self.mean_y += dy * (other.weight / total);
        self.weight = total;
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

    #[test]
    fn comoments_merge_equals_one_stream_and_the_two_pass_formula() {
        let xs = [
            1e8 + 1.0,
            1e8 + 4.0,
            1e8 + 2.5,
            1e8 - 3.0,
            1e8 + 10.0,
            1e8 + 0.5,
        ];
        let ys = [1.0, 0.0, 1.0, 1.0, 0.0, 0.0];
        let ws = [1.0, 2.0, 0.0, 3.0, 1.0, 2.0];
        let mut whole = Comoments::default();
        let (mut a, mut b) = (Comoments::default(), Comoments::default());
        for i in 0..xs.len() {
            whole.push(xs[i], ys[i], ws[i]);
            if i < 2 {
                a.push(xs[i], ys[i], ws[i])
            } else {
                b.push(xs[i], ys[i], ws[i])
            }
        }
        for (y, w) in [(1.0, 2.0), (0.0, 1.0)] {
            whole.push_null(y, w);
            b.push_null(y, w);
        }
        a.merge(&b);
        // The two-pass formula, with the means taken off each value first (every value
        // here is exact in f64, and so are the means' offsets below).
        let w: f64 = ws.iter().sum();
        let offset = (0..6).map(|i| ws[i] * (xs[i] - 1e8)).sum::<f64>() / w;
        let mx = offset + 1e8;
        let my = (0..6).map(|i| ws[i] * ys[i]).sum::<f64>() / w;
        let c: f64 = (0..6).map(|i| ws[i] * (xs[i] - mx) * (ys[i] - my)).sum();
        for m in [whole, a] {
            assert!((m.comoment - c).abs() < 1e-12, "{} vs {c}", m.comoment);
            assert!((m.mean_less(1e8) - offset).abs() < 1e-15);
            assert!((m.mean_y - my).abs() < 1e-15);
            assert_eq!(m.weight, w);
            assert_eq!(m.null_weight, 3.0);
            assert!((m.null_mean_y - 2.0 / 3.0).abs() < 1e-15);
        }
    }
}
