//! One comparison: a metric in a treatment arm against control, from arm-level moments.
//!
//! Chooses the estimator (Welch for means, two proportions for 0/1 metrics, delta method for
//! ratios), applies CUPED when covariate moments are present (ratio metrics through their
//! linearisation), switches to always-valid inference on request, and computes the MDE and
//! power of the comparison. Pure: moments in, estimates out.

use super::cuped::{self, Paired};
use super::{Estimate, Moments, RatioMoments, estimate_normal, power, relative, sequential, welch};

/// Moments of one arm for one metric, as the statistics table gives them.
#[derive(Debug, Clone, Copy)]
pub enum ArmMoments {
    Mean {
        y: Moments,
        covariate: Option<(Moments, f64)>,
    },
    Ratio {
        r: RatioMoments,
        covariate: Option<RatioCovariate>,
    },
}

/// Pre-exposure moments of a ratio metric's numerator and denominator, and the covariances
/// linking them to the post-exposure parts.
#[derive(Debug, Clone, Copy)]
pub struct RatioCovariate {
    pub numerator: Moments,
    pub denominator: Moments,
    /// cov(num_pre, den_pre), cov(num, num_pre), cov(num, den_pre), cov(den, num_pre), cov(den, den_pre).
    pub pre: f64,
    pub n_np: f64,
    pub n_dp: f64,
    pub d_np: f64,
    pub d_dp: f64,
}

#[derive(Debug, Clone, Copy)]
pub struct Options {
    pub alpha: f64,
    pub cuped: bool,
    pub sequential: bool,
    /// Target power for the MDE (common practice: 0.8).
    pub power: f64,
}

#[derive(Debug, Clone, Copy)]
pub struct Comparison {
    pub difference: Option<Estimate>,
    pub relative: Option<Estimate>,
    /// θ and the share of variance removed, when CUPED was applied.
    pub cuped: Option<(f64, f64)>,
    /// Minimum detectable effect (absolute) at the current sample size.
    pub mde: Option<f64>,
    /// Power to detect the declared relative MDE, if one is declared.
    pub power_at_declared: Option<f64>,
    /// The control value the relative numbers refer to.
    pub control_value: Option<f64>,
}

/// A ratio arm linearised: y = (N − R·D)/μ_D, x likewise for the covariate (Deng, Knoblich &
/// Lu 2018, §3; CUPED on the linearised values as in Deng et al. 2013).
struct Linear {
    n: f64,
    r: f64,
    rp: f64,
    var_y: f64,
    var_x: f64,
    cov: f64,
}

fn linearise(r: &RatioMoments, c: &RatioCovariate) -> Linear {
    let (mn, md) = (r.numerator.mean, r.denominator.mean);
    let (mnp, mdp) = (c.numerator.mean, c.denominator.mean);
    let (big_r, rp) = (mn / md, mnp / mdp);
    Linear {
        n: r.numerator.n as f64,
        r: big_r,
        rp,
        var_y: (r.numerator.var - 2.0 * big_r * r.cov + big_r * big_r * r.denominator.var) / (md * md),
        var_x: (c.numerator.var - 2.0 * rp * c.pre + rp * rp * c.denominator.var) / (mdp * mdp),
        cov: (c.n_np - rp * c.n_dp - big_r * c.d_np + big_r * rp * c.d_dp) / (md * mdp),
    }
}

/// Relative difference from two arm means and the variances of those means (delta method,
/// Deng, Knoblich & Lu 2018): Var(t/c) ≈ v_t/c² + t²·v_c/c⁴.
fn relative_of(c: f64, vc: f64, t: f64, vt: f64, alpha: f64) -> Option<Estimate> {
    if c == 0.0 {
        return None;
    }
    estimate_normal(t / c - 1.0, (vt / (c * c) + t * t * vc / c.powi(4)).sqrt(), alpha)
}

/// Compares `treatment` with `control`; `group` holds every planned arm of the same slice
/// (for θ, which is pooled over arms). `binary` marks 0/1 metrics.
pub fn compare(
    control: &ArmMoments,
    treatment: &ArmMoments,
    group: &[ArmMoments],
    binary: bool,
    declared_mde: Option<f64>,
    o: &Options,
) -> Comparison {
    let mut out = Comparison {
        difference: None,
        relative: None,
        cuped: None,
        mde: None,
        power_at_declared: None,
        control_value: None,
    };
    match (control, treatment) {
        (ArmMoments::Mean { y: c, covariate: cc }, ArmMoments::Mean { y: t, covariate: tc }) => {
            out.control_value = Some(c.mean);
            let raw = if binary && c.var.is_finite() && t.var.is_finite() {
                let x = |m: &Moments| (m.mean * m.n as f64).round() as u64;
                super::two_proportions(x(t), t.n, x(c), c.n, o.alpha, false)
            } else {
                welch(c, t, o.alpha)
            };
            out.difference = raw;
            out.relative = relative(c, t, o.alpha);
            if o.cuped
                && let (Some((cx, ccov)), Some((tx, tcov))) = (cc, tc)
            {
                let pairs: Vec<Paired> = group
                    .iter()
                    .filter_map(|g| match g {
                        ArmMoments::Mean {
                            y,
                            covariate: Some((x, cov)),
                        } => Some(Paired {
                            y: *y,
                            x: *x,
                            cov: *cov,
                        }),
                        _ => None,
                    })
                    .collect();
                if let Some(theta) = cuped::pooled_theta(&pairs) {
                    let mx = cuped::pooled_x_mean(&pairs);
                    let ca = cuped::adjust(
                        &Paired {
                            y: *c,
                            x: *cx,
                            cov: *ccov,
                        },
                        theta,
                        mx,
                    );
                    let ta = cuped::adjust(
                        &Paired {
                            y: *t,
                            x: *tx,
                            cov: *tcov,
                        },
                        theta,
                        mx,
                    );
                    if let (Some(adj), Some(raw)) = (welch(&ca, &ta, o.alpha), raw) {
                        let reduction = if raw.se > 0.0 {
                            1.0 - (adj.se / raw.se).powi(2)
                        } else {
                            0.0
                        };
                        out.cuped = Some((theta, reduction));
                        out.difference = Some(adj);
                        out.relative = relative_of(
                            ca.mean,
                            ca.var / ca.n as f64,
                            ta.mean,
                            ta.var / ta.n as f64,
                            o.alpha,
                        );
                    }
                }
            }
        }
        (ArmMoments::Ratio { r: c, covariate: cc }, ArmMoments::Ratio { r: t, covariate: tc }) => {
            out.control_value = Some(c.ratio());
            out.difference = super::ratio_difference(c, t, o.alpha);
            out.relative = super::ratio_relative(c, t, o.alpha);
            if o.cuped
                && let (Some(cc), Some(tc)) = (cc, tc)
            {
                let lins: Vec<Linear> = group
                    .iter()
                    .filter_map(|g| match g {
                        ArmMoments::Ratio {
                            r,
                            covariate: Some(cv),
                        } => Some(linearise(r, cv)),
                        _ => None,
                    })
                    .collect();
                let num: f64 = lins.iter().map(|l| (l.n - 1.0) * l.cov).sum();
                let den: f64 = lins.iter().map(|l| (l.n - 1.0) * l.var_x).sum();
                let theta = num / den;
                let total: f64 = lins.iter().map(|l| l.n).sum();
                let rp_pooled = lins.iter().map(|l| l.n * l.rp).sum::<f64>() / total;
                let (lc, lt) = (linearise(c, cc), linearise(t, tc));
                let adj_mean = |l: &Linear| l.r - theta * (l.rp - rp_pooled);
                let adj_var =
                    |l: &Linear| (l.var_y + theta * theta * l.var_x - 2.0 * theta * l.cov).max(0.0) / l.n;
                if theta.is_finite()
                    && let Some(raw) = out.difference
                {
                    let se = (adj_var(&lc) + adj_var(&lt)).sqrt();
                    if let Some(adj) = estimate_normal(adj_mean(&lt) - adj_mean(&lc), se, o.alpha) {
                        let reduction = if raw.se > 0.0 {
                            1.0 - (adj.se / raw.se).powi(2)
                        } else {
                            0.0
                        };
                        out.cuped = Some((theta, reduction));
                        out.difference = Some(adj);
                        out.relative =
                            relative_of(adj_mean(&lc), adj_var(&lc), adj_mean(&lt), adj_var(&lt), o.alpha);
                    }
                }
            }
        }
        _ => {}
    }
    let cv = out.control_value.map(f64::abs).filter(|v| *v > 0.0);
    if let Some(d) = out.difference.filter(|d| d.se > 0.0) {
        out.mde = Some(power::mde(d.se, o.alpha, o.power));
        if let (Some(m), Some(cv)) = (declared_mde, cv) {
            out.power_at_declared = Some(power::power_normal(m * cv, d.se, o.alpha));
        }
        if o.sequential {
            // Mixing scale τ fixed before looking: the declared MDE, else 5% of control.
            let tau = cv.map(|cv| declared_mde.unwrap_or(0.05) * cv).unwrap_or(d.se);
            if let Some((p, lo, hi)) = sequential::msprt(d.estimate, d.se * d.se, tau, o.alpha) {
                out.difference = Some(Estimate {
                    p_value: Some(p),
                    ci_low: lo,
                    ci_high: hi,
                    ..d
                });
                if let (Some(rel), Some(c)) = (out.relative, out.control_value.filter(|c| *c != 0.0)) {
                    out.relative = Some(Estimate {
                        p_value: Some(p),
                        ci_low: lo / c.abs(),
                        ci_high: hi / c.abs(),
                        ..rel
                    });
                }
            }
        }
    }
    out
}
