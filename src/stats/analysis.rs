//! One comparison: a metric in a treatment arm against control, from arm-level moments.
//!
//! Chooses the estimator (Welch for means, two proportions for 0/1 metrics, Fisher's exact test
//! with Newcombe's interval for 0/1 metrics with few events, delta method for ratios), applies
//! CUPED when covariate moments are present (ratio metrics through their linearisation),
//! switches to always-valid inference on request, and computes the MDE and power of the test
//! actually used. Pure: moments in, estimates out.

use super::cuped::{self, Paired};
use super::{Estimate, Moments, RatioMoments, estimate_normal, exact, power, relative, sequential, welch};

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
    /// Two-sided level of the interval (the p-value does not depend on it).
    pub alpha: f64,
    /// Level the MDE and power are computed at: the level the row's verdict effectively uses
    /// (e.g. α/m for a Holm family of m rows).
    pub plan_alpha: f64,
    pub cuped: bool,
    pub sequential: bool,
    /// Target power for the MDE (common practice: 0.8).
    pub power: f64,
}

/// The estimator behind a row (`method` in JSON).
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Method {
    /// Welch's t on per-unit values.
    Welch,
    /// Two proportions: Wald interval, pooled z test.
    TwoProportions,
    /// Few events: Fisher's exact test and Newcombe's hybrid score interval.
    FisherNewcombe,
    /// Ratio of means by the delta method.
    DeltaRatio,
}

/// Why a row with data has no test.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Untestable {
    /// Every unit has the same value within each arm, and the arms differ.
    NoVariation,
    /// Sequential mode needs a nonzero control value to fix its mixing scale.
    SequentialZeroControl,
    /// Sequential mode relies on the normal approximation, which few events do not support.
    SequentialFewEvents,
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
    pub method: Method,
    /// Set when the row has data but no valid test; its p-value is then `None`.
    pub untestable: Option<Untestable>,
}

impl Comparison {
    /// Machine-friendly code of the method actually used, e.g. `cuped_welch`, `msprt_welch`.
    pub fn method_code(&self, sequential: bool) -> String {
        let base = match self.method {
            Method::Welch => "welch",
            Method::TwoProportions => "two_proportions",
            Method::FisherNewcombe => "fisher_newcombe",
            Method::DeltaRatio => "delta_ratio",
        };
        let cuped = if self.cuped.is_some() { "cuped_" } else { "" };
        let seq = if sequential && self.method != Method::FisherNewcombe {
            "msprt_"
        } else {
            ""
        };
        format!("{seq}{cuped}{base}")
    }
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

/// Relative difference (t − c)/|c| from two arm means and the variances of those means (delta
/// method, Deng, Knoblich & Lu 2018): Var ≈ v_t/c² + t²·v_c/c⁴. Dividing by |c| keeps the sign
/// of the difference when the control value is negative.
fn relative_of(c: f64, vc: f64, t: f64, vt: f64, alpha: f64) -> Option<Estimate> {
    if c == 0.0 {
        return None;
    }
    estimate_normal(
        (t - c) / c.abs(),
        (vt / (c * c) + t * t * vc / c.powi(4)).sqrt(),
        alpha,
    )
}

/// A 0/1 comparison with few events: Fisher's p-value, Newcombe's interval; the relative
/// interval divides the difference interval by the control rate (treated as known). The SE
/// reported (and used for the MDE) is the pooled one of the test under no difference.
fn exact_binary(xc: u64, nc: u64, xt: u64, nt: u64, alpha: f64) -> Option<(Estimate, Option<Estimate>)> {
    let p = exact::fisher_two_sided(xt, nt, xc, nc)?;
    let (lo, hi) = exact::newcombe(xt, nt, xc, nc, alpha)?;
    let (pc, pt) = (xc as f64 / nc as f64, xt as f64 / nt as f64);
    let pooled = (xc + xt) as f64 / (nc + nt) as f64;
    let se0 = (pooled * (1.0 - pooled) * (1.0 / nc as f64 + 1.0 / nt as f64)).sqrt();
    let d = Estimate {
        estimate: pt - pc,
        se: se0,
        ci_low: lo,
        ci_high: hi,
        p_value: Some(p),
        df: f64::INFINITY,
    };
    let rel = (pc > 0.0).then(|| Estimate {
        estimate: (pt - pc) / pc,
        se: se0 / pc,
        ci_low: lo / pc,
        ci_high: hi / pc,
        p_value: Some(p),
        df: f64::INFINITY,
    });
    Some((d, rel))
}

/// Compares `treatment` with `control`; `group` holds every planned arm of the same slice
/// (for θ, which is estimated within arms and pooled over them). `binary` marks 0/1 metrics.
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
        method: Method::Welch,
        untestable: None,
    };
    match (control, treatment) {
        (ArmMoments::Mean { y: c, covariate: cc }, ArmMoments::Mean { y: t, covariate: tc }) => {
            out.control_value = Some(c.mean);
            let x = |m: &Moments| (m.mean * m.n as f64).round() as u64;
            let binary = binary && c.var.is_finite() && t.var.is_finite();
            if binary && exact::needs_exact(x(c), c.n, x(t), t.n) {
                out.method = Method::FisherNewcombe;
                if let Some((d, rel)) = exact_binary(x(c), c.n, x(t), t.n, o.alpha) {
                    out.difference = Some(d);
                    out.relative = rel;
                    if o.sequential {
                        out.untestable = Some(Untestable::SequentialFewEvents);
                        out.difference = Some(Estimate { p_value: None, ..d });
                    } else if d.se > 0.0 {
                        out.mde = Some(power::mde(d.se, o.plan_alpha, o.power));
                        if let (Some(m), Some(cv)) = (declared_mde, Some(c.mean).filter(|v| *v > 0.0)) {
                            out.power_at_declared = Some(power::power_normal(m * cv, d.se, o.plan_alpha));
                        }
                    }
                }
                return out;
            }
            let raw = if binary {
                out.method = Method::TwoProportions;
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
                if let Some(theta) = cuped::within_theta(&pairs) {
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
            out.method = Method::DeltaRatio;
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
    let Some(d) = out.difference else {
        return out;
    };
    if d.se == 0.0 {
        // Both arms constant: no sampling variation to test against. Equal arms are simply no
        // change; different ones cannot be tested, and saying "no detectable change" would
        // hide a difference that is plainly there.
        if d.estimate != 0.0 {
            out.untestable = Some(Untestable::NoVariation);
        }
        return out;
    }
    if !o.sequential {
        out.mde = Some(power::mde(d.se, o.plan_alpha, o.power));
        if let (Some(m), Some(cv)) = (declared_mde, cv) {
            out.power_at_declared = Some(power::power_normal(m * cv, d.se, o.plan_alpha));
        }
        return out;
    }
    // Mixing scale τ fixed before looking: the declared MDE, else 5% of the control value.
    // Without a control value there is nothing to fix it by, and a scale taken from the data
    // being tested would void the always-valid guarantee.
    let Some(cv) = cv else {
        out.untestable = Some(Untestable::SequentialZeroControl);
        out.difference = Some(Estimate { p_value: None, ..d });
        return out;
    };
    let tau = declared_mde.unwrap_or(0.05) * cv;
    out.mde = Some(power::mde_sequential(d.se, tau, o.plan_alpha, o.power));
    if let Some(m) = declared_mde {
        out.power_at_declared = Some(power::power_sequential(m * cv, d.se, tau, o.plan_alpha));
    }
    if let Some((p, lo, hi)) = sequential::msprt(d.estimate, d.se * d.se, tau, o.alpha) {
        out.difference = Some(Estimate {
            p_value: Some(p),
            ci_low: lo,
            ci_high: hi,
            ..d
        });
        if let Some(rel) = out.relative {
            out.relative = Some(Estimate {
                p_value: Some(p),
                ci_low: lo / cv,
                ci_high: hi / cv,
                ..rel
            });
        }
    }
    out
}
