//! Stage 7, `stats`: pure functions from sufficient statistics to effects and checks.
//!
//! No I/O, no SQL: the inputs are per-arm counts, means, variances and covariances (what the
//! warehouse returns), the outputs are estimates with intervals and p-values. Each formula
//! cites its source beside it. Distributions come from `statrs`.

pub mod analysis;
pub mod cuped;
pub mod exact;
pub mod multiple;
pub mod power;
pub mod readout;
pub mod sequential;

use statrs::distribution::{ChiSquared, ContinuousCDF, Normal, StudentsT};

/// Units per arm below which a skewed metric's mean is not yet near-normal: `n < 355·g₁²`, g₁
/// the skewness of the per-unit values (Kohavi, Deng, Longbotham & Xu 2014, "Seven Rules of
/// Thumb for Web Site Experimenters", KDD, rule 7; recalled from memory). tests/simulation.rs shows what it guards against: below
/// it, one tail of a 95% interval misses far more often than 2.5%.
pub const HEAVY_TAIL_FACTOR: f64 = 355.0;

/// Sample skewness g₁ = m₃ / m₂^{3/2} of a column, from its moments and its third central
/// moment `m3` (population form; m₂ = var_samp·(n − 1)/n). `None` without spread.
pub fn skewness(m: &Moments, m3: f64) -> Option<f64> {
    if m.n < 3 || !m.var.is_finite() || !m3.is_finite() {
        return None;
    }
    let m2 = m.var * (m.n - 1) as f64 / m.n as f64;
    // A spread this small relative to the mean is rounding, not a distribution.
    if m2 <= 1e-24 * m.mean.abs().max(1.0).powi(2) {
        return None;
    }
    Some(m3 / m2.powf(1.5))
}

/// Count, mean and sample variance (n - 1 denominator) of one per-unit column in one arm.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Moments {
    pub n: u64,
    pub mean: f64,
    pub var: f64,
}

impl Moments {
    /// Moments of raw values with a two-pass algorithm (mean first, then squared deviations),
    /// which is stable where a one-pass sum of squares is not (NIST StRD NumAcc4).
    pub fn from_values(values: &[f64]) -> Moments {
        let n = values.len();
        if n == 0 {
            return Moments {
                n: 0,
                mean: f64::NAN,
                var: f64::NAN,
            };
        }
        let mean = values.iter().sum::<f64>() / n as f64;
        let mean = mean + values.iter().map(|v| v - mean).sum::<f64>() / n as f64;
        let var = if n < 2 {
            f64::NAN
        } else {
            let ss: f64 = values.iter().map(|v| (v - mean) * (v - mean)).sum();
            let comp: f64 = values.iter().map(|v| v - mean).sum();
            (ss - comp * comp / n as f64) / (n as f64 - 1.0)
        };
        Moments {
            n: n as u64,
            mean,
            var,
        }
    }

    pub fn sd(&self) -> f64 {
        self.var.sqrt()
    }

    /// Variance of the mean estimate.
    fn var_of_mean(&self) -> f64 {
        self.var / self.n as f64
    }
}

/// An estimate with a two-sided interval and p-value.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Estimate {
    pub estimate: f64,
    pub se: f64,
    pub ci_low: f64,
    pub ci_high: f64,
    /// `None` when the test is undefined (no variance in either arm).
    pub p_value: Option<f64>,
    /// Degrees of freedom of the reference t distribution; infinite for a normal one.
    pub df: f64,
}

/// Quantile of the standard normal distribution.
pub fn z_quantile(p: f64) -> f64 {
    Normal::new(0.0, 1.0).expect("standard normal").inverse_cdf(p)
}

fn t_dist(df: f64) -> Option<StudentsT> {
    StudentsT::new(0.0, 1.0, df).ok()
}

/// An estimate with a normal reference distribution.
pub fn estimate_normal(point: f64, se: f64, alpha: f64) -> Option<Estimate> {
    estimate(point, se, f64::INFINITY, alpha)
}

/// Builds an estimate from a point value, its standard error and reference df
/// (`f64::INFINITY` for the normal approximation).
fn estimate(point: f64, se: f64, df: f64, alpha: f64) -> Option<Estimate> {
    if !point.is_finite() || !se.is_finite() || se < 0.0 {
        return None;
    }
    if se == 0.0 {
        return Some(Estimate {
            estimate: point,
            se,
            ci_low: point,
            ci_high: point,
            p_value: None,
            df,
        });
    }
    let (crit, p) = if df.is_finite() {
        let t = t_dist(df)?;
        let stat = point / se;
        (t.inverse_cdf(1.0 - alpha / 2.0), 2.0 * t.cdf(-stat.abs()))
    } else {
        let stat = point / se;
        let n = Normal::new(0.0, 1.0).ok()?;
        (n.inverse_cdf(1.0 - alpha / 2.0), 2.0 * n.cdf(-stat.abs()))
    };
    Some(Estimate {
        estimate: point,
        se,
        ci_low: point - crit * se,
        ci_high: point + crit * se,
        p_value: Some(p.clamp(0.0, 1.0)),
        df,
    })
}

/// Difference of means (treatment - control) with Welch's t test.
///
/// SE = sqrt(s_t²/n_t + s_c²/n_c); degrees of freedom by the Welch–Satterthwaite equation
/// (Welch 1947, Biometrika 34; Satterthwaite 1946): df = (a + b)² / (a²/(n_t-1) + b²/(n_c-1))
/// with a = s_t²/n_t, b = s_c²/n_c. Needs at least two units per arm.
pub fn welch(control: &Moments, treatment: &Moments, alpha: f64) -> Option<Estimate> {
    if control.n < 2 || treatment.n < 2 {
        return None;
    }
    let a = treatment.var_of_mean();
    let b = control.var_of_mean();
    let se = (a + b).sqrt();
    let df = (a + b).powi(2) / (a * a / (treatment.n as f64 - 1.0) + b * b / (control.n as f64 - 1.0));
    let df = if df.is_finite() { df } else { f64::INFINITY };
    estimate(treatment.mean - control.mean, se, df, alpha)
}

/// Relative difference of means, (mean_t − mean_c) / |mean_c|, with a delta-method interval.
///
/// Var(Ȳt/Ȳc) ≈ Var(Ȳt)/Ȳc² + Ȳt²·Var(Ȳc)/Ȳc⁴ for independent arms (Deng, Knoblich & Lu 2018,
/// "Applying the Delta Method in Metric Analytics", KDD, §3); normal reference distribution.
/// Dividing by |mean_c| equals mean_t/mean_c − 1 for a positive control mean and keeps the
/// sign of the difference for a negative one (the variance is the same).
pub fn relative(control: &Moments, treatment: &Moments, alpha: f64) -> Option<Estimate> {
    if control.n < 2 || treatment.n < 2 || control.mean == 0.0 {
        return None;
    }
    let (mc, mt) = (control.mean, treatment.mean);
    let var = treatment.var_of_mean() / (mc * mc) + mt * mt * control.var_of_mean() / mc.powi(4);
    estimate((mt - mc) / mc.abs(), var.sqrt(), f64::INFINITY, alpha)
}

/// Per-arm moments of a ratio metric: numerator and denominator per unit and their covariance.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct RatioMoments {
    pub numerator: Moments,
    pub denominator: Moments,
    /// Sample covariance of numerator and denominator over the same units.
    pub cov: f64,
}

impl RatioMoments {
    /// The ratio of means, mean(num) / mean(den).
    pub fn ratio(&self) -> f64 {
        self.numerator.mean / self.denominator.mean
    }

    /// Variance of the ratio-of-means estimate by the delta method (Deng, Knoblich & Lu 2018,
    /// KDD, §3.2): Var(X̄/Ȳ) ≈ (1/n)(σx²/μy² − 2μxσxy/μy³ + μx²σy²/μy⁴).
    pub fn var_of_ratio(&self) -> f64 {
        let n = self.numerator.n as f64;
        let (mx, my) = (self.numerator.mean, self.denominator.mean);
        (self.numerator.var / (my * my) - 2.0 * mx * self.cov / my.powi(3)
            + mx * mx * self.denominator.var / my.powi(4))
            / n
    }

    fn usable(&self) -> bool {
        self.numerator.n >= 2 && self.denominator.mean != 0.0 && self.var_of_ratio().is_finite()
    }
}

/// Difference of two ratio metrics (treatment − control), delta method, normal reference.
pub fn ratio_difference(control: &RatioMoments, treatment: &RatioMoments, alpha: f64) -> Option<Estimate> {
    if !control.usable() || !treatment.usable() {
        return None;
    }
    let var = control.var_of_ratio() + treatment.var_of_ratio();
    estimate(
        treatment.ratio() - control.ratio(),
        var.max(0.0).sqrt(),
        f64::INFINITY,
        alpha,
    )
}

/// Relative difference of two ratio metrics, (R_t − R_c)/|R_c|, delta method (same paper, §3).
pub fn ratio_relative(control: &RatioMoments, treatment: &RatioMoments, alpha: f64) -> Option<Estimate> {
    if !control.usable() || !treatment.usable() || control.ratio() == 0.0 {
        return None;
    }
    let (rc, rt) = (control.ratio(), treatment.ratio());
    let var = treatment.var_of_ratio() / (rc * rc) + rt * rt * control.var_of_ratio() / rc.powi(4);
    estimate((rt - rc) / rc.abs(), var.max(0.0).sqrt(), f64::INFINITY, alpha)
}

/// Result of the sample-ratio check.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct SampleRatio {
    pub chi_square: f64,
    pub df: u32,
    pub p_value: f64,
    pub mismatch: bool,
}

/// Threshold below which a sample-ratio mismatch is flagged (common practice).
pub const SRM_THRESHOLD: f64 = 0.001;

/// Pearson's chi-square goodness of fit of observed arm sizes against planned shares
/// (Pearson 1900; df = arms − 1). Shares need not sum to one.
pub fn sample_ratio(observed: &[u64], shares: &[f64]) -> Option<SampleRatio> {
    let total: f64 = observed.iter().map(|&o| o as f64).sum();
    let share_sum: f64 = shares.iter().sum();
    if observed.len() < 2 || observed.len() != shares.len() || total == 0.0 || share_sum <= 0.0 {
        return None;
    }
    let chi_square: f64 = observed
        .iter()
        .zip(shares)
        .map(|(&o, &s)| {
            let expected = total * s / share_sum;
            (o as f64 - expected).powi(2) / expected
        })
        .sum();
    let df = observed.len() as u32 - 1;
    let p_value = ChiSquared::new(df as f64).ok()?.sf(chi_square);
    Some(SampleRatio {
        chi_square,
        df,
        p_value,
        mismatch: p_value < SRM_THRESHOLD,
    })
}

/// Difference of two proportions x₁/n₁ − x₂/n₂: the Wald interval (unpooled SE) and the
/// two-sided p-value of the pooled z test — R's `prop.test(correct = FALSE)` (Agresti,
/// "Categorical Data Analysis", §3.1). `continuity` widens the interval by ½(1/n₁ + 1/n₂) and
/// applies Yates' correction to the test, as R's default `prop.test` does.
pub fn two_proportions(x1: u64, n1: u64, x2: u64, n2: u64, alpha: f64, continuity: bool) -> Option<Estimate> {
    if n1 == 0 || n2 == 0 {
        return None;
    }
    let (n1f, n2f) = (n1 as f64, n2 as f64);
    let (p1, p2) = (x1 as f64 / n1f, x2 as f64 / n2f);
    let d = p1 - p2;
    let se = (p1 * (1.0 - p1) / n1f + p2 * (1.0 - p2) / n2f).sqrt();
    let pooled = (x1 + x2) as f64 / (n1f + n2f);
    let se0 = (pooled * (1.0 - pooled) * (1.0 / n1f + 1.0 / n2f)).sqrt();
    let cc = if continuity {
        0.5 * (1.0 / n1f + 1.0 / n2f)
    } else {
        0.0
    };
    let z_crit = z_quantile(1.0 - alpha / 2.0);
    let p_value = if se0 > 0.0 {
        let z = ((d.abs() - cc).max(0.0)) / se0;
        Some((2.0 * Normal::new(0.0, 1.0).ok()?.cdf(-z)).clamp(0.0, 1.0))
    } else {
        None
    };
    Some(Estimate {
        estimate: d,
        se,
        ci_low: (d - z_crit * se - cc).max(-1.0),
        ci_high: (d + z_crit * se + cc).min(1.0),
        p_value,
        df: f64::INFINITY,
    })
}

/// The pooled z statistic of two proportions (no continuity correction).
pub fn pooled_z(x1: u64, n1: u64, x2: u64, n2: u64) -> f64 {
    let (n1f, n2f) = (n1 as f64, n2 as f64);
    let pooled = (x1 + x2) as f64 / (n1f + n2f);
    (x1 as f64 / n1f - x2 as f64 / n2f) / (pooled * (1.0 - pooled) * (1.0 / n1f + 1.0 / n2f)).sqrt()
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn zero_variance_has_no_p_value() {
        let c = Moments {
            n: 10,
            mean: 1.0,
            var: 0.0,
        };
        let e = welch(&c, &c, 0.05).unwrap();
        assert_eq!(e.estimate, 0.0);
        assert_eq!(e.p_value, None);
    }

    #[test]
    fn too_few_units_give_nothing() {
        let c = Moments {
            n: 1,
            mean: 1.0,
            var: f64::NAN,
        };
        assert!(welch(&c, &c, 0.05).is_none());
        assert!(relative(&c, &c, 0.05).is_none());
    }
}
