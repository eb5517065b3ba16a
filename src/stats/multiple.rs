//! Multiple-testing adjustments of p-values.
//!
//! Holm (1979), "A simple sequentially rejective multiple test procedure", Scand. J. Statist.
//! 6(2): controls the family-wise error rate. Benjamini & Hochberg (1995), "Controlling the
//! false discovery rate", JRSS-B 57(1), §3: controls the false discovery rate. Both return
//! adjusted p-values in input order (reject when adjusted p ≤ α), as R's `p.adjust` does.

/// Holm step-down adjusted p-values: p̃_(i) = max_{j ≤ i} min(1, (m − j + 1) p_(j)).
pub fn holm(p: &[f64]) -> Vec<f64> {
    let m = p.len();
    let mut order: Vec<usize> = (0..m).collect();
    order.sort_by(|&a, &b| p[a].total_cmp(&p[b]));
    let mut out = vec![0.0; m];
    let mut running: f64 = 0.0;
    for (rank, &i) in order.iter().enumerate() {
        running = running.max(((m - rank) as f64 * p[i]).min(1.0));
        out[i] = running;
    }
    out
}

/// Benjamini–Hochberg step-up adjusted p-values: p̃_(i) = min_{j ≥ i} min(1, m p_(j) / j).
pub fn benjamini_hochberg(p: &[f64]) -> Vec<f64> {
    let m = p.len();
    let mut order: Vec<usize> = (0..m).collect();
    order.sort_by(|&a, &b| p[a].total_cmp(&p[b]));
    let mut out = vec![0.0; m];
    let mut running: f64 = 1.0;
    for (rank, &i) in order.iter().enumerate().rev() {
        running = running.min((m as f64 * p[i] / (rank + 1) as f64).min(1.0));
        out[i] = running;
    }
    out
}
