//! CUPED: variance reduction with a pre-exposure covariate.
//!
//! Deng, Xu, Kohavi & Walker (2013), "Improving the Sensitivity of Online Controlled
//! Experiments by Utilizing Pre-Experiment Data", WSDM, §3.2: Ŷ_cv = Ȳ − θ(X̄ − E X) with
//! θ = Cov(Y, X) / Var(X) minimises the variance; the same θ is used in every arm, so the
//! adjustment leaves the expected difference unchanged. Here θ is the within-arm slope: the
//! covariance and variance are pooled over arms around each arm's own means (the ANCOVA slope),
//! from the arm-level moments alone. A total-sample θ would also absorb the treatment effect
//! through the between-arm term and shrink small-sample effects; the within-arm θ makes the
//! adjusted difference equal the OLS treatment coefficient of Y ~ 1 + T + X, and it is the
//! same θ the ratio-metric CUPED uses.

use super::Moments;

/// Arm-level moments of a metric `y` and its covariate `x` over the same units.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Paired {
    pub y: Moments,
    pub x: Moments,
    /// Sample covariance of y and x.
    pub cov: f64,
}

impl Paired {
    /// Sample variance of the adjusted value y − θx in this arm.
    pub fn adjusted_var(&self, theta: f64) -> f64 {
        self.y.var + theta * theta * self.x.var - 2.0 * theta * self.cov
    }
}

/// θ = Σₐ (nₐ − 1)·cov(y, x)ₐ / Σₐ (nₐ − 1)·var(x)ₐ: the pooled within-arm slope.
pub fn within_theta(arms: &[Paired]) -> Option<f64> {
    if arms.iter().any(|a| a.y.n != a.x.n || a.y.n < 2) || arms.is_empty() {
        return None;
    }
    let (mut sxy, mut sxx) = (0.0, 0.0);
    for a in arms {
        let na = a.y.n as f64;
        sxy += (na - 1.0) * a.cov;
        sxx += (na - 1.0) * a.x.var;
    }
    let theta = sxy / sxx;
    (sxx > 0.0 && theta.is_finite()).then_some(theta)
}

/// θ from the total-sample covariance and variance of all units, recovered from per-arm
/// moments: S_xy = Σ[(n_a − 1)·c_a + n_a·(x̄_a − x̄)(ȳ_a − ȳ)] / (N − 1), likewise S_xx. Not used
/// by the readout (see the module doc); kept as the textbook form the tests compare against.
pub fn pooled_theta(arms: &[Paired]) -> Option<f64> {
    let n: f64 = arms.iter().map(|a| a.y.n as f64).sum();
    if n < 3.0 || arms.iter().any(|a| a.y.n != a.x.n || a.y.n < 2) {
        return None;
    }
    let mx = arms.iter().map(|a| a.y.n as f64 * a.x.mean).sum::<f64>() / n;
    let my = arms.iter().map(|a| a.y.n as f64 * a.y.mean).sum::<f64>() / n;
    let (mut sxy, mut sxx) = (0.0, 0.0);
    for a in arms {
        let na = a.y.n as f64;
        sxy += (na - 1.0) * a.cov + na * (a.x.mean - mx) * (a.y.mean - my);
        sxx += (na - 1.0) * a.x.var + na * (a.x.mean - mx).powi(2);
    }
    let theta = sxy / sxx;
    (sxx > 0.0 && theta.is_finite()).then_some(theta)
}

/// The CUPED-adjusted arm moments: mean ȳ − θ(x̄ − x̄_pooled) and the variance of y − θx.
/// Differences of adjusted means equal (ȳt − ȳc) − θ(x̄t − x̄c).
pub fn adjust(arm: &Paired, theta: f64, pooled_x_mean: f64) -> Moments {
    Moments {
        n: arm.y.n,
        mean: arm.y.mean - theta * (arm.x.mean - pooled_x_mean),
        var: arm.adjusted_var(theta).max(0.0),
    }
}

/// Mean of x over all units of `arms`.
pub fn pooled_x_mean(arms: &[Paired]) -> f64 {
    let n: f64 = arms.iter().map(|a| a.x.n as f64).sum();
    arms.iter().map(|a| a.x.n as f64 * a.x.mean).sum::<f64>() / n
}
