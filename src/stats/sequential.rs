//! Always-valid inference for people who look at a running experiment every day.
//!
//! The mixture sequential probability ratio test (mSPRT) of Johari, Pekelis & Walsh (2017),
//! "Peeking at A/B Tests", KDD, §4, for a difference of means with a normal mixing
//! distribution N(0, τ²) over the effect: with Δ̂ the estimate and V its variance,
//!   Λ = sqrt(V / (V + τ²)) · exp(τ² Δ̂² / (2 V (V + τ²))),
//! and the always-valid p-value is min(1, 1/Λ) (its running minimum over looks). The matching
//! confidence sequence (the normal-mixture boundary, Howard, Ramdas, McAuliffe & Sekhon 2021,
//! "Time-uniform, nonparametric, nonasymptotic confidence sequences", Ann. Statist. 49(2),
//! eq. for the normal mixture) is
//!   Δ̂ ± sqrt( V (V + τ²)/τ² · (2 log(1/α) + log((V + τ²)/V)) ).
//!
//! Mixing parameter: τ is fixed per metric before looking — the declared MDE in absolute
//! units (relative MDE × control mean), or 5% of the control mean when no MDE is declared.
//! τ near the effect one hopes to detect makes the test most powerful around that effect
//! (Johari et al., §5); it must not be tuned on the data being tested.

/// Always-valid p-value and interval for an estimate `delta` with variance `v`.
pub fn msprt(delta: f64, v: f64, tau: f64, alpha: f64) -> Option<(f64, f64, f64)> {
    if !(v > 0.0 && tau > 0.0 && delta.is_finite()) {
        return None;
    }
    let t2 = tau * tau;
    let log_lambda = 0.5 * (v / (v + t2)).ln() + t2 * delta * delta / (2.0 * v * (v + t2));
    let p = (-log_lambda).exp().min(1.0);
    let half = (v * (v + t2) / t2 * (2.0 * (1.0 / alpha).ln() + ((v + t2) / v).ln())).sqrt();
    Some((p, delta - half, delta + half))
}
