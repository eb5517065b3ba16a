//! Small-sample methods for 0/1 metrics, where the normal approximation misleads.
//!
//! With few events (or few non-events) in an arm, the pooled z test is anti-conservative and
//! the Wald interval can have zero width (3/3 vs 0/3 gives p = 0.014 and [1, 1]). For those
//! rows plumb uses Fisher's exact test (Fisher 1935, "The logic of inductive inference",
//! JRSS 98; two-sided p as the sum of the probabilities of all tables with the same margins
//! that are no more likely than the observed one, as R's `fisher.test` computes it) and
//! Newcombe's hybrid score interval for the difference of proportions (Newcombe 1998,
//! "Interval estimation for the difference between independent proportions", Statistics in
//! Medicine 17, method 10), built from Wilson score intervals of each arm (Wilson 1927,
//! JASA 22). Fisher's test is conservative; the interval is not its exact dual, so the
//! readout calls a row significant only when both agree (see `readout`).

use super::z_quantile;
use statrs::function::gamma::ln_gamma;

/// Fewest events or non-events an arm may have before a 0/1 metric switches from the normal
/// approximation to the exact test (common practice: n·p ≥ 10 and n·(1 − p) ≥ 10 per arm).
pub const MIN_EVENTS_FOR_NORMAL: u64 = 10;

/// True when a 0/1 comparison of x₁/n₁ against x₂/n₂ needs the small-sample methods.
pub fn needs_exact(x1: u64, n1: u64, x2: u64, n2: u64) -> bool {
    [x1, n1.saturating_sub(x1), x2, n2.saturating_sub(x2)]
        .iter()
        .any(|&c| c < MIN_EVENTS_FOR_NORMAL)
}

fn ln_choose(n: u64, k: u64) -> f64 {
    ln_gamma(n as f64 + 1.0) - ln_gamma(k as f64 + 1.0) - ln_gamma((n - k) as f64 + 1.0)
}

/// Two-sided p-value of Fisher's exact test for the 2×2 table [[x1, n1 − x1], [x2, n2 − x2]].
///
/// Conditional on the margins, x1 is hypergeometric; the p-value sums the probabilities of
/// every x1 whose probability is at most the observed one (with R's relative tolerance 1e-7
/// for ties). Cost is linear in the range of x1, at most min(n1, n2, events, non-events) + 1.
pub fn fisher_two_sided(x1: u64, n1: u64, x2: u64, n2: u64) -> Option<f64> {
    if x1 > n1 || x2 > n2 || n1 == 0 || n2 == 0 {
        return None;
    }
    let k = x1 + x2;
    let n = n1 + n2;
    let lo = k.saturating_sub(n2);
    let hi = k.min(n1);
    let denom = ln_choose(n, k);
    let ln_p = |x: u64| ln_choose(n1, x) + ln_choose(n2, k - x) - denom;
    let observed = ln_p(x1);
    let cutoff = observed + (1.0f64 + 1e-7).ln();
    let mut p = 0.0;
    for x in lo..=hi {
        let l = ln_p(x);
        if l <= cutoff {
            p += l.exp();
        }
    }
    Some(p.clamp(0.0, 1.0))
}

/// Wilson score interval for x/n at two-sided level 1 − `alpha` (Wilson 1927).
pub fn wilson(x: u64, n: u64, alpha: f64) -> Option<(f64, f64)> {
    if n == 0 || x > n {
        return None;
    }
    let z = z_quantile(1.0 - alpha / 2.0);
    let nf = n as f64;
    let p = x as f64 / nf;
    let z2 = z * z;
    let centre = (p + z2 / (2.0 * nf)) / (1.0 + z2 / nf);
    let half = z / (1.0 + z2 / nf) * (p * (1.0 - p) / nf + z2 / (4.0 * nf * nf)).sqrt();
    Some(((centre - half).max(0.0), (centre + half).min(1.0)))
}

/// Newcombe's hybrid score interval (method 10) for x₁/n₁ − x₂/n₂:
/// L = δ − sqrt((p₁ − l₁)² + (u₂ − p₂)²), U = δ + sqrt((u₁ − p₁)² + (p₂ − l₂)²), with (lᵢ, uᵢ)
/// the Wilson intervals of each proportion.
pub fn newcombe(x1: u64, n1: u64, x2: u64, n2: u64, alpha: f64) -> Option<(f64, f64)> {
    let (l1, u1) = wilson(x1, n1, alpha)?;
    let (l2, u2) = wilson(x2, n2, alpha)?;
    let p1 = x1 as f64 / n1 as f64;
    let p2 = x2 as f64 / n2 as f64;
    let d = p1 - p2;
    let low = d - ((p1 - l1).powi(2) + (u2 - p2).powi(2)).sqrt();
    let high = d + ((u1 - p1).powi(2) + (p2 - l2).powi(2)).sqrt();
    Some((low.max(-1.0), high.min(1.0)))
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn rule_counts_events_and_non_events() {
        assert!(needs_exact(3, 3, 0, 3));
        assert!(needs_exact(995, 1000, 500, 1000));
        assert!(!needs_exact(10, 20, 10, 20));
    }

    #[test]
    fn fisher_is_symmetric_in_arms() {
        let a = fisher_two_sided(7, 40, 1, 35).unwrap();
        let b = fisher_two_sided(1, 35, 7, 40).unwrap();
        assert!((a - b).abs() < 1e-12, "{a} {b}");
    }
}
