//! Arm-level statistics from per-unit rows, the same whatever the row order or thread count.
//!
//! The local engine computes the readout's final aggregation here instead of in SQL: count,
//! mean, sample variance, third central moment and sample covariance per arm (and per arm and segment value), the
//! very numbers the template's final `SELECT` computes with `count`, `avg`, `var_samp` and
//! `covar_samp` (and `avg` of cubed deviations). Floating-point addition depends on order, and a parallel engine adds in a
//! scheduling-dependent order; here every sum is *order-independent*: each value is rounded
//! onto a fixed binary grid chosen from the largest magnitude in its group (62 significant
//! bits below it) and the grid integers are added exactly in `i128`. The result depends only
//! on the multiset of values, so rows may arrive in any order and columns may be computed on
//! any number of threads. Variances and covariances are two-pass (mean first, then the sum of
//! squared deviations), which is what keeps the NIST StRD `NumAcc` datasets exact to 1e-9
//! (tests/compiler.rs); the grid rounding error is at most n·2⁻⁶³ of the largest term, below
//! ordinary double-precision summation error.

/// Exact-on-a-grid sum of `values` (finite; NaN or infinity propagate as in plain summation).
pub fn grid_sum(values: impl Iterator<Item = f64> + Clone) -> f64 {
    let mut max = 0.0f64;
    for v in values.clone() {
        if !v.is_finite() {
            return values.sum();
        }
        max = max.max(v.abs());
    }
    if max == 0.0 {
        return 0.0;
    }
    // Grid step 2^lsb with max / 2^lsb < 2^62. The scaling by a power of two is exact; it is
    // split in two factors so that neither overflows (both have the same sign of exponent, so
    // the intermediate lies between the value and the result).
    let lsb = exponent(max) + 1 - 62;
    let (a, b) = (-lsb / 2, -lsb - (-lsb / 2));
    let (fa, fb) = (2f64.powi(a), 2f64.powi(b));
    let mut sum: i128 = 0;
    for v in values {
        sum += (v * fa * fb).round_ties_even() as i128;
    }
    scale(sum as f64, lsb)
}

/// The binary exponent `e` with `2^e <= x < 2^(e+1)` (x > 0, finite).
fn exponent(x: f64) -> i32 {
    let bits = x.to_bits();
    let biased = ((bits >> 52) & 0x7ff) as i32;
    if biased == 0 {
        // Subnormal: below 2^-1022.
        -1074 + (64 - (bits & ((1 << 52) - 1)).leading_zeros() as i32) - 1
    } else {
        biased - 1023
    }
}

/// `x · 2^k`, exactly (in steps, so that no intermediate power of two overflows).
fn scale(mut x: f64, mut k: i32) -> f64 {
    while k > 1000 {
        x *= 2f64.powi(1000);
        k -= 1000;
    }
    while k < -1000 {
        x *= 2f64.powi(-1000);
        k += 1000;
    }
    x * 2f64.powi(k)
}

/// A per-unit column: values and whether each is present (SQL NULL when not).
#[derive(Debug, Clone, Default)]
pub struct Column {
    pub values: Vec<f64>,
    pub valid: Vec<bool>,
}

impl Column {
    fn get(&self, row: usize) -> Option<f64> {
        self.valid[row].then(|| self.values[row])
    }
}

/// `count`, `avg` and `var_samp` of a column over `rows` (NULLs skipped, as SQL does).
pub fn moments(col: &Column, rows: &[u32]) -> (u64, Option<f64>, Option<f64>) {
    let present: Vec<f64> = rows.iter().filter_map(|&r| col.get(r as usize)).collect();
    let n = present.len() as u64;
    if n == 0 {
        return (0, None, None);
    }
    let mean = grid_sum(present.iter().copied()) / n as f64;
    let var = (n > 1).then(|| grid_sum(present.iter().map(|x| (x - mean) * (x - mean))) / (n - 1) as f64);
    (n, Some(mean), var)
}

/// The third central moment `avg((x - mean)³)` of a column over `rows` (NULLs skipped; the
/// population form, which the template's final `SELECT` computes about the arm's mean).
pub fn third_moment(col: &Column, rows: &[u32]) -> Option<f64> {
    let present: Vec<f64> = rows.iter().filter_map(|&r| col.get(r as usize)).collect();
    let n = present.len();
    if n == 0 {
        return None;
    }
    let mean = grid_sum(present.iter().copied()) / n as f64;
    Some(grid_sum(present.iter().map(|x| (x - mean) * (x - mean) * (x - mean))) / n as f64)
}

/// `covar_samp` of two columns over the rows of `rows` where both are present.
pub fn covariance(a: &Column, b: &Column, rows: &[u32]) -> Option<f64> {
    let pairs: Vec<(f64, f64)> = rows
        .iter()
        .filter_map(|&r| Some((a.get(r as usize)?, b.get(r as usize)?)))
        .collect();
    let n = pairs.len();
    if n < 2 {
        return None;
    }
    let ma = grid_sum(pairs.iter().map(|p| p.0)) / n as f64;
    let mb = grid_sum(pairs.iter().map(|p| p.1)) / n as f64;
    Some(grid_sum(pairs.iter().map(|(x, y)| (x - ma) * (y - mb))) / (n - 1) as f64)
}

#[cfg(test)]
mod tests {
    use super::*;

    /// SplitMix64, for test data.
    fn values(n: usize, seed: u64) -> Vec<f64> {
        let mut s = seed;
        (0..n)
            .map(|_| {
                s = s.wrapping_add(0x9E37_79B9_7F4A_7C15);
                let mut z = s;
                z = (z ^ (z >> 30)).wrapping_mul(0xBF58_476D_1CE4_E5B9);
                z = (z ^ (z >> 27)).wrapping_mul(0x94D0_49BB_1331_11EB);
                let u = (z ^ (z >> 31)) as f64 / u64::MAX as f64;
                (u - 0.3) * 1e3 + 1e6 * (u * u * u * u)
            })
            .collect()
    }

    #[test]
    fn sums_do_not_depend_on_order() {
        let v = values(100_000, 7);
        let forward = grid_sum(v.iter().copied());
        let mut r = v.clone();
        r.reverse();
        assert_eq!(grid_sum(r.iter().copied()).to_bits(), forward.to_bits());
        let mut sorted = v.clone();
        sorted.sort_by(f64::total_cmp);
        assert_eq!(grid_sum(sorted.iter().copied()).to_bits(), forward.to_bits());
        // Plain summation does depend on order on the same data (why this module exists).
        let plain: f64 = v.iter().sum();
        let plain_sorted: f64 = sorted.iter().sum();
        assert_ne!(plain.to_bits(), plain_sorted.to_bits());
        // And the grid sum is as close to the exact sum as a correctly rounded one can be
        // expected to be: compare with a compensated (Neumaier) sum.
        let (mut s, mut c) = (0.0f64, 0.0f64);
        for &x in &v {
            let t = s + x;
            c += if s.abs() >= x.abs() {
                (s - t) + x
            } else {
                (x - t) + s
            };
            s = t;
        }
        assert!(
            (forward - (s + c)).abs() <= 1e-12 * (s + c).abs(),
            "{forward} vs {}",
            s + c
        );
    }

    #[test]
    fn exact_on_small_integers_and_signs() {
        assert_eq!(grid_sum([1.0, 2.0, 3.0].into_iter()), 6.0);
        // The exact sum of the three doubles nearest 0.1, 0.2 and -0.3 is 2^-55.
        assert_eq!(grid_sum([0.1, 0.2, -0.3].into_iter()), 2f64.powi(-55));
        assert_eq!(grid_sum([].into_iter()), 0.0);
        assert_eq!(grid_sum([0.0, -0.0].into_iter()), 0.0);
        assert!(grid_sum([1.0, f64::NAN].into_iter()).is_nan());
        assert_eq!(
            grid_sum([1e300, -1e300, 5e-300].into_iter()),
            0.0,
            "below the grid of 1e300"
        );
        assert_eq!(grid_sum([5e-310, 5e-310].into_iter()), 5e-310 * 2.0, "subnormals");
    }

    #[test]
    fn moments_match_the_two_pass_definition_and_skip_nulls() {
        let col = Column {
            values: vec![2.0, 4.0, 4.0, 4.0, 5.0, 5.0, 7.0, 9.0, 100.0],
            valid: vec![true, true, true, true, true, true, true, true, false],
        };
        let rows: Vec<u32> = (0..9).collect();
        let (n, mean, var) = moments(&col, &rows);
        assert_eq!(n, 8);
        assert_eq!(mean, Some(5.0));
        assert_eq!(var, Some(32.0 / 7.0));
        assert_eq!(
            moments(&col, &[0]),
            (1, Some(2.0), None),
            "var_samp of one value is NULL"
        );
        assert_eq!(moments(&col, &[8]), (0, None, None));
        let other = Column {
            values: vec![1.0, 2.0, 2.0, 2.0, 3.0, 3.0, 4.0, 5.0, 0.0],
            valid: vec![true; 9],
        };
        // Third moment about the mean 5 of the eight present values: (-27 - 1 - 1 - 1 + 0 + 0 +
        // 8 + 64) / 8.
        assert_eq!(third_moment(&col, &rows), Some(42.0 / 8.0));
        assert_eq!(third_moment(&col, &[8]), None);
        // Covariance over the rows where both are present (row 8 is NULL in `col`): means 5 and
        // 2.75, sum of cross products 19, over n - 1 = 7.
        assert_eq!(covariance(&col, &other, &rows), Some(19.0 / 7.0));
    }
}
