//! Power, minimum detectable effect and sample size for two-sample comparisons.
//!
//! Normal approximation (e.g. van Belle, "Statistical Rules of Thumb", ch. 2; Lehr's rule
//! n ≈ 16/Δ² per group is its rounding): with allocation shares q and 1 − q of N units,
//! SE(Δ̂) = σ·sqrt(1/(qN) + 1/((1−q)N)); power = Φ(|δ|/SE − z₁₋α/₂) + Φ(−|δ|/SE − z₁₋α/₂);
//! MDE = (z₁₋α/₂ + z_power)·SE. For small samples the exact two-sample t power uses the
//! noncentral t distribution (as R's `power.t.test`), computed here by numerical integration.

use super::z_quantile;
use statrs::distribution::{ChiSquared, Continuous, ContinuousCDF, Normal, StudentsT};

fn phi(x: f64) -> f64 {
    Normal::new(0.0, 1.0).expect("standard normal").cdf(x)
}

/// Minimum detectable effect (absolute) for a comparison with standard error `se`.
pub fn mde(se: f64, alpha: f64, power: f64) -> f64 {
    (z_quantile(1.0 - alpha / 2.0) + z_quantile(power)) * se
}

/// Power of a two-sided z test to detect an effect `delta` when the estimate has SE `se`.
pub fn power_normal(delta: f64, se: f64, alpha: f64) -> f64 {
    let z = z_quantile(1.0 - alpha / 2.0);
    let s = delta.abs() / se;
    phi(s - z) + phi(-s - z)
}

/// Total units N needed so that a difference `delta` in a metric with sd `sd` is detected
/// with `power`, when a share `q` of units is in the treatment arm (0 < q < 1).
pub fn total_units(delta: f64, sd: f64, alpha: f64, power: f64, q: f64) -> f64 {
    let k = z_quantile(1.0 - alpha / 2.0) + z_quantile(power);
    (k * sd / delta).powi(2) * (1.0 / q + 1.0 / (1.0 - q))
}

/// P(T > t) for a noncentral t with `df` degrees of freedom and noncentrality `ncp`:
/// T = (Z + ncp)/sqrt(V/df), V ~ χ²(df), so P(T > t) = E_V[ Φ(ncp − t·sqrt(V/df)) ],
/// integrated over the χ² density with composite Simpson's rule on its bulk.
pub fn noncentral_t_sf(t: f64, df: f64, ncp: f64) -> f64 {
    let chi = ChiSquared::new(df).expect("df > 0");
    let lo = chi.inverse_cdf(1e-12);
    let hi = chi.inverse_cdf(1.0 - 1e-12);
    let steps = 4000;
    let h = (hi - lo) / steps as f64;
    let f = |v: f64| chi.pdf(v) * phi(ncp - t * (v / df).sqrt());
    let mut sum = f(lo) + f(hi);
    for i in 1..steps {
        let v = lo + i as f64 * h;
        sum += if i % 2 == 1 { 4.0 } else { 2.0 } * f(v);
    }
    sum * h / 3.0
}

/// Exact power of the two-sided, two-sample t test with `n` units per group (equal sizes),
/// standardized effect `d` = δ/σ (R: `power.t.test(n, delta, sd)`).
pub fn power_t_two_sample(n: f64, d: f64, alpha: f64) -> f64 {
    let df = 2.0 * (n - 1.0);
    let ncp = d * (n / 2.0).sqrt();
    let crit = StudentsT::new(0.0, 1.0, df)
        .expect("df > 0")
        .inverse_cdf(1.0 - alpha / 2.0);
    noncentral_t_sf(crit, df, ncp) + (1.0 - noncentral_t_sf(-crit, df, ncp))
}

/// Units per group for the two-sided two-sample t test to reach `power` (continuous n, as R's
/// `power.t.test(power = ..., delta = d)` reports it), by bisection.
pub fn n_t_two_sample(d: f64, alpha: f64, power: f64) -> f64 {
    let (mut lo, mut hi) = (2.0, 1e7);
    for _ in 0..200 {
        let mid = 0.5 * (lo + hi);
        if power_t_two_sample(mid, d, alpha) < power {
            lo = mid;
        } else {
            hi = mid;
        }
    }
    0.5 * (lo + hi)
}

/// A sample-size plan for one metric: what an experiment needs to detect `mde`.
#[derive(Debug, Clone, PartialEq)]
pub struct Plan {
    /// Units needed per arm, in the order of `shares` (control first).
    pub units_per_arm: Vec<f64>,
    pub total_units: f64,
    /// Days at `units_per_day`, if known.
    pub days: Option<f64>,
}

/// Units needed so that every treatment arm's difference from control (the first share) of
/// absolute size `delta` is detected with `power`, each comparison at level `alpha`:
/// SE = σ·sqrt(1/(s_c N) + 1/(s_t N)), so N = (z₁₋α/₂ + z_power)² σ² (1/s_c + 1/s_t) / δ² for
/// the smallest treatment share s_t (normal approximation, as in `total_units`).
pub fn plan(
    delta: f64,
    sd: f64,
    alpha: f64,
    power: f64,
    shares: &[f64],
    units_per_day: Option<f64>,
) -> Option<Plan> {
    let total: f64 = shares.iter().sum();
    if shares.len() < 2 || total <= 0.0 || delta == 0.0 || !sd.is_finite() {
        return None;
    }
    let s: Vec<f64> = shares.iter().map(|x| x / total).collect();
    let k = z_quantile(1.0 - alpha / 2.0) + z_quantile(power);
    let worst = s[1..].iter().cloned().fold(f64::INFINITY, f64::min);
    let n = (k * sd / delta).powi(2) * (1.0 / s[0] + 1.0 / worst);
    Some(Plan {
        units_per_arm: s.iter().map(|x| x * n).collect(),
        total_units: n,
        days: units_per_day.filter(|u| *u > 0.0).map(|u| n / u),
    })
}

/// The smallest relative effect detectable with `n_total` units split by `shares`, for a
/// metric with mean `mean` and sd `sd`.
pub fn detectable(n_total: f64, mean: f64, sd: f64, alpha: f64, power: f64, shares: &[f64]) -> f64 {
    let total: f64 = shares.iter().sum();
    let s: Vec<f64> = shares.iter().map(|x| x / total).collect();
    let worst = s[1..].iter().cloned().fold(f64::INFINITY, f64::min);
    let se = sd * (1.0 / (s[0] * n_total) + 1.0 / (worst * n_total)).sqrt();
    mde(se, alpha, power) / mean.abs()
}

/// Everything `plumb power` reports for one metric: the plan for the requested split, the
/// plans of the usual two-arm alternatives, and what a fixed duration could detect.
#[derive(Debug, Clone, PartialEq)]
pub struct Study {
    pub main: Plan,
    /// `("60/40", plan)`, ... (two-arm requests only; the requested split left out).
    pub alternatives: Vec<(String, Plan)>,
    /// The relative MDE of an experiment of the given days, if asked.
    pub detectable: Option<f64>,
}

/// What a study should detect, and with which traffic.
#[derive(Debug, Clone, Copy)]
pub struct Target<'a> {
    /// Relative change worth detecting (0.02 for 2%).
    pub mde: f64,
    pub alpha: f64,
    pub power: f64,
    /// Planned shares, control first.
    pub split: &'a [f64],
    pub units_per_day: f64,
    /// Also report what an experiment of this many days could detect.
    pub days: Option<f64>,
}

/// Plans a study to detect `target` on a metric with per-unit `mean` and `sd`.
pub fn study(mean: f64, sd: f64, target: &Target) -> Option<Study> {
    let Target {
        mde,
        alpha,
        power,
        split,
        units_per_day,
        days,
    } = *target;
    let delta = mde * mean.abs();
    let main = plan(delta, sd, alpha, power, split, Some(units_per_day))?;
    let alternatives = [
        vec![50.0, 50.0],
        vec![60.0, 40.0],
        vec![80.0, 20.0],
        vec![90.0, 10.0],
    ]
    .into_iter()
    .filter(|s| split.len() == 2 && s != split)
    .filter_map(|s| {
        let label = format!("{}/{}", s[0], s[1]);
        plan(delta, sd, alpha, power, &s, Some(units_per_day)).map(|p| (label, p))
    })
    .collect();
    let detectable = days.map(|d| detectable(d * units_per_day, mean, sd, alpha, power, split));
    Some(Study {
        main,
        alternatives,
        detectable,
    })
}

/// Critical |estimate|/SE of the always-valid mSPRT at its last look (see `sequential`): the
/// normal-mixture boundary half-width over the SE,
/// sqrt((V + τ²)/τ² · (2 log(1/α) + log((V + τ²)/V))) with V = SE².
pub fn sequential_critical(se: f64, tau: f64, alpha: f64) -> f64 {
    let v = se * se;
    let t2 = tau * tau;
    ((v + t2) / t2 * (2.0 * (1.0 / alpha).ln() + ((v + t2) / v).ln())).sqrt()
}

/// MDE of the always-valid test if the data were looked at only once, at the current sample
/// size: (c_seq + z_power)·SE. Conservative for a test that is monitored, because crossing the
/// boundary at an earlier look also counts as a detection.
pub fn mde_sequential(se: f64, tau: f64, alpha: f64, power: f64) -> f64 {
    (sequential_critical(se, tau, alpha) + z_quantile(power)) * se
}

/// Power of the always-valid test at its last look to detect `delta` (lower bound, as above).
pub fn power_sequential(delta: f64, se: f64, tau: f64, alpha: f64) -> f64 {
    let c = sequential_critical(se, tau, alpha);
    let s = delta.abs() / se;
    phi(s - c) + phi(-s - c)
}
