//! The statistics checked against published values (and, where no published example exists,
//! against derived values computed two independent ways). Each check names its source.
//! Reference data files are copies of the workplace's shared reference data.

use plumb::stats::{self, Moments, RatioMoments};

fn read_csv(name: &str) -> (Vec<String>, Vec<Vec<String>>) {
    let path = format!("{}/tests/data/reference/{name}", env!("CARGO_MANIFEST_DIR"));
    let text = std::fs::read_to_string(&path).unwrap_or_else(|e| panic!("{path}: {e}"));
    let mut lines = text.lines();
    let header = lines.next().unwrap().split(',').map(str::to_string).collect();
    let rows = lines
        .filter(|l| !l.trim().is_empty())
        .map(|l| l.split(',').map(str::to_string).collect())
        .collect();
    (header, rows)
}

fn column(name: &str) -> Vec<f64> {
    let (_, rows) = read_csv(name);
    rows.iter().map(|r| r[0].parse().unwrap()).collect()
}

fn assert_close(got: f64, want: f64, tol: f64, what: &str) {
    assert!(
        (got - want).abs() <= tol,
        "{what}: got {got}, want {want} ± {tol}"
    );
}

fn assert_rel(got: f64, want: f64, rel: f64, what: &str) {
    assert!(
        ((got - want) / want).abs() <= rel,
        "{what}: got {got:.15e}, want {want:.15e} (relative tolerance {rel})"
    );
}

/// NIST StRD, Univariate Summary Statistics: certified mean and sample standard deviation.
/// A one-pass sum-of-squares variance fails NumAcc3/NumAcc4; the two-pass one must not.
#[test]
fn nist_strd_univariate_mean_and_sd() {
    // (file, certified mean, certified sd, relative tolerance): 1e-9 / 1e-8 on NumAcc3/4
    // because f64 inputs cap the achievable accuracy there (shared REFERENCES.md).
    let cases = [
        ("nist_strd_lew.csv", -177.435, 277.332168044316, 1e-12),
        ("nist_strd_lottery.csv", 518.958715596330, 291.699727470969, 1e-12),
        (
            "nist_strd_mavro.csv",
            2.00185600000000,
            0.000429123454003053,
            1e-9,
        ),
        (
            "nist_strd_michelso.csv",
            299.852400000000,
            0.0790105478190518,
            1e-9,
        ),
        ("nist_strd_numacc1.csv", 10000002.0, 1.0, 1e-12),
        ("nist_strd_numacc2.csv", 1.2, 0.1, 1e-12),
        ("nist_strd_numacc3.csv", 1000000.2, 0.1, 1e-9),
        ("nist_strd_numacc4.csv", 10000000.2, 0.1, 1e-8),
        ("nist_strd_pidigits.csv", 4.5348, 2.86733906028871, 1e-12),
    ];
    for (file, mean, sd, tol) in cases {
        let m = Moments::from_values(&column(file));
        assert_rel(m.mean, mean, 1e-14, &format!("{file} mean"));
        assert_rel(m.sd(), sd, tol, &format!("{file} sd"));
    }
}

fn sleep_groups() -> (Moments, Moments) {
    let (_, rows) = read_csv("r_sleep.csv");
    let values = |g: &str| -> Vec<f64> {
        rows.iter()
            .filter(|r| r[0] == g)
            .map(|r| r[1].parse().unwrap())
            .collect()
    };
    (
        Moments::from_values(&values("1")),
        Moments::from_values(&values("2")),
    )
}

/// R `t.test(extra ~ group, data = sleep)` (Student 1908 data): t = -1.8608, df = 17.776,
/// p = 0.07939, 95% CI of mean1 - mean2 = (-3.3654832, 0.2054832), means 0.75 and 2.33.
/// plumb reports treatment - control, so group 1 plays treatment and group 2 control.
#[test]
fn welch_matches_r_sleep_example() {
    let (g1, g2) = sleep_groups();
    assert_close(g1.mean, 0.75, 5e-3, "mean of group 1");
    assert_close(g2.mean, 2.33, 5e-3, "mean of group 2");
    let e = stats::welch(&g2, &g1, 0.05).unwrap();
    assert_close(e.estimate / e.se, -1.8608, 5e-5, "t");
    assert_close(e.df, 17.776, 5e-4, "df");
    assert_close(e.p_value.unwrap(), 0.07939, 5e-6, "p");
    assert_close(e.ci_low, -3.3654832, 5e-8, "ci low");
    assert_close(e.ci_high, 0.2054832, 5e-8, "ci high");
}

/// Relative difference by the delta method (Deng, Knoblich & Lu 2018): derived, no published
/// example. Var(Ȳt/Ȳc) ≈ Var(Ȳt)/Ȳc² + Ȳt²·Var(Ȳc)/Ȳc⁴, computed here by hand on the sleep data.
#[test]
fn relative_difference_delta_method_derived() {
    let (g1, g2) = sleep_groups();
    let e = stats::relative(&g2, &g1, 0.05).unwrap();
    let (mt, mc) = (g1.mean, g2.mean);
    let var = (g1.var / 10.0) / (mc * mc) + mt * mt * (g2.var / 10.0) / mc.powi(4);
    assert_close(e.estimate, mt / mc - 1.0, 1e-15, "relative estimate");
    assert_close(e.se, var.sqrt(), 1e-15, "relative se");
    let z = 1.959963984540054; // standard normal 0.975 quantile (well known)
    assert_close(e.ci_low, e.estimate - z * e.se, 1e-12, "relative ci");
}

/// Sample-ratio mismatch: 600 vs 400 with a 50/50 design gives chi-square 40,
/// p = 2.54e-10 (Wikipedia, "Sample ratio mismatch", Example).
#[test]
fn srm_matches_wikipedia_example() {
    let s = stats::sample_ratio(&[600, 400], &[50.0, 50.0]).unwrap();
    assert_close(s.chi_square, 40.0, 1e-12, "chi-square");
    assert_rel(s.p_value, 2.54e-10, 0.002, "p");
    assert!(s.mismatch);
}

/// Goodness of fit with four categories: Mendel's peas 315/108/101/32 against 9:3:3:1,
/// X² = 0.47002, df = 3, p = 0.9254 (R `chisq.test(x, p = c(9,3,3,1)/16)`).
#[test]
fn goodness_of_fit_matches_r_mendel_example() {
    let s = stats::sample_ratio(&[315, 108, 101, 32], &[9.0, 3.0, 3.0, 1.0]).unwrap();
    assert_close(s.chi_square, 0.47002, 5e-6, "X²");
    assert_eq!(s.df, 3);
    assert_close(s.p_value, 0.9254, 5e-5, "p");
    assert!(!s.mismatch);
}

fn ratio_arm(rows: &[Vec<String>], arm: &str) -> RatioMoments {
    let pick = |i: usize| -> Vec<f64> {
        rows.iter()
            .filter(|r| r[0] == arm)
            .map(|r| r[i].parse().unwrap())
            .collect()
    };
    let (x, y) = (pick(2), pick(3));
    let (mx, my) = (Moments::from_values(&x), Moments::from_values(&y));
    let cov = x
        .iter()
        .zip(&y)
        .map(|(a, b)| (a - mx.mean) * (b - my.mean))
        .sum::<f64>()
        / (x.len() as f64 - 1.0);
    RatioMoments {
        numerator: mx,
        denominator: my,
        cov,
    }
}

/// Delta method for ratio metrics (Deng, Knoblich & Lu 2018, KDD): derived values from
/// shared REFERENCES.md (closed form and a statistics library agree): R_c = 1.5,
/// Var(R_c) = 0.0206611570; R_t = 1.7916666667, Var(R_t) = 0.0146819273; difference
/// 0.2916666667 (SE 0.1879975647); relative 0.1944444444 (SE 0.1400938559).
#[test]
fn ratio_metric_delta_method_derived() {
    let (_, rows) = read_csv("derived_ratio_metric.csv");
    let (c, t) = (ratio_arm(&rows, "control"), ratio_arm(&rows, "treatment"));
    assert_close(c.ratio(), 1.5, 5e-11, "R_c");
    assert_close(c.var_of_ratio(), 0.0206611570, 5e-11, "Var(R_c)");
    assert_close(t.ratio(), 1.7916666667, 5e-11, "R_t");
    assert_close(t.var_of_ratio(), 0.0146819273, 5e-11, "Var(R_t)");
    let d = stats::ratio_difference(&c, &t, 0.05).unwrap();
    assert_close(d.estimate, 0.2916666667, 5e-11, "difference");
    assert_close(d.se, 0.1879975647, 5e-11, "difference SE");
    let r = stats::ratio_relative(&c, &t, 0.05).unwrap();
    assert_close(r.estimate, 0.1944444444, 5e-11, "relative");
    assert_close(r.se, 0.1400938559, 5e-11, "relative SE");
}

/// R `prop.test(x = c(490, 400), n = c(500, 500))`: with Yates' correction X-squared = 80.909
/// and CI (0.1408536, 0.2191464); without it the pooled z = 9.0960 (z² = 82.737) and the Wald
/// CI is (0.1428536, 0.2171464).
#[test]
fn two_proportions_match_r_prop_test() {
    let wald = stats::two_proportions(490, 500, 400, 500, 0.05, false).unwrap();
    assert_close(wald.ci_low, 0.1428536, 5e-8, "Wald low");
    assert_close(wald.ci_high, 0.2171464, 5e-8, "Wald high");
    let z = stats::pooled_z(490, 500, 400, 500);
    assert_close(z, 9.0960, 5e-5, "pooled z");
    assert_close(z * z, 82.737, 5e-4, "z²");
    let yates = stats::two_proportions(490, 500, 400, 500, 0.05, true).unwrap();
    assert_close(yates.ci_low, 0.1408536, 5e-8, "Yates low");
    assert_close(yates.ci_high, 0.2191464, 5e-8, "Yates high");
    // X-squared with Yates' correction is the square of the corrected pooled z.
    let se0 = ((890.0 / 1000.0) * (110.0 / 1000.0) * (2.0 / 500.0f64)).sqrt();
    assert_close(((0.18 - 0.002) / se0).powi(2), 80.909, 5e-4, "X-squared (Yates)");
}

/// Pooled two-proportion z test, 118/3303 vs 80/3303: z = 2.74195, two-sided p = 0.00611
/// (worked answer, usablestats AskStats #866).
#[test]
fn pooled_z_matches_worked_example() {
    assert_close(stats::pooled_z(118, 3303, 80, 3303), 2.74195, 5e-6, "z");
    let e = stats::two_proportions(118, 3303, 80, 3303, 0.05, false).unwrap();
    assert_close(e.p_value.unwrap(), 0.00611, 5e-6, "p");
}

fn bh_pvalues() -> Vec<f64> {
    column("bh1995_pvalues.csv")
}

/// Benjamini & Hochberg (1995), JRSS-B 57(1), §4 example: at q = 0.05 BH rejects 4 of the 15
/// hypotheses; adjusted p-values as R's p.adjust(method = "BH").
#[test]
fn benjamini_hochberg_matches_the_1995_example() {
    let adj = stats::multiple::benjamini_hochberg(&bh_pvalues());
    let want = [
        0.0015, 0.003, 0.0095, 0.035625, 0.0603, 0.063857, 0.063857, 0.0645, 0.0765, 0.486, 0.581182,
        0.714875, 0.753231, 0.813214, 1.0,
    ];
    for (i, (g, w)) in adj.iter().zip(want).enumerate() {
        assert_close(*g, w, 5e-7, &format!("BH adjusted p #{}", i + 1));
    }
    assert_eq!(adj.iter().filter(|p| **p <= 0.05).count(), 4);
}

/// Holm on the same 15 p-values (shared REFERENCES.md; R p.adjust(method = "holm")): rejects 3.
#[test]
fn holm_matches_the_1995_example() {
    let adj = stats::multiple::holm(&bh_pvalues());
    let want = [0.0015, 0.0056, 0.0247, 0.114, 0.2211, 0.278, 0.278, 0.278, 0.3213];
    for (i, (g, w)) in adj.iter().zip(want).enumerate() {
        assert_close(*g, w, 5e-5, &format!("Holm adjusted p #{}", i + 1));
    }
    assert!(adj[9..].iter().all(|p| *p == 1.0));
    assert_eq!(adj.iter().filter(|p| **p <= 0.05).count(), 3);
}

/// Lehr's rule (van Belle, "Statistical Rules of Thumb", ch. 2): n ≈ 16/Δ² per group for
/// two-sided α = 0.05 and power 0.80; the exact normal multiplier 2(z.975 + z.80)² = 15.6978
/// gives 62.79 per group at Δ = 0.5. Binary outcomes p1 = 0.1, p2 = 0.3: 16·p̄(1−p̄)/(p1−p2)² = 64.
#[test]
fn sample_size_matches_lehrs_rule() {
    let per_group = stats::power::total_units(0.5, 1.0, 0.05, 0.8, 0.5) / 2.0;
    assert_close(per_group, 62.79, 5e-3, "n per group at Δ = 0.5");
    assert_close(per_group * 0.25, 15.6978, 5e-4, "multiplier");
    let pbar: f64 = 0.2;
    assert_close(
        16.0 * pbar * (1.0 - pbar) / 0.04,
        64.0,
        1e-12,
        "Lehr, binary (rule of thumb)",
    );
    let exact = stats::power::total_units(0.2, (pbar * (1.0 - pbar)).sqrt(), 0.05, 0.8, 0.5) / 2.0;
    assert!(
        (exact - 64.0).abs() < 2.0,
        "normal-approximation n {exact} vs Lehr's 64"
    );
}

/// Cohen (1988), two-sample t table, two-sided α = .05, power .80: d = 0.2 / 0.5 / 0.8 need
/// 393 / 64 / 26 per group (the table uses approximations: ±2 at d = 0.2, ±1 otherwise).
#[test]
fn sample_size_matches_cohens_table() {
    for (d, want, tol) in [(0.2, 393.0, 2.0), (0.5, 64.0, 1.0), (0.8, 26.0, 1.0)] {
        let n = stats::power::n_t_two_sample(d, 0.05, 0.8).ceil();
        assert!((n - want).abs() <= tol, "d = {d}: n = {n}, Cohen {want}");
    }
}

/// R `power.t.test(n = 20, delta = 1, sd = 1)`: power = 0.8689528;
/// `power.t.test(power = .90, delta = 1)`: n = 22.02110.
#[test]
fn t_test_power_matches_r_power_t_test() {
    assert_close(
        stats::power::power_t_two_sample(20.0, 1.0, 0.05),
        0.8689528,
        5e-7,
        "power",
    );
    assert_close(stats::power::n_t_two_sample(1.0, 0.05, 0.9), 22.02110, 5e-5, "n");
}

fn cuped_arms() -> Vec<stats::cuped::Paired> {
    let (_, rows) = read_csv("derived_cuped.csv");
    ["control", "treatment"]
        .iter()
        .map(|arm| {
            let pick = |i: usize| -> Vec<f64> {
                rows.iter()
                    .filter(|r| r[0] == *arm)
                    .map(|r| r[i].parse().unwrap())
                    .collect()
            };
            let (x, y) = (pick(2), pick(3));
            let (mx, my) = (Moments::from_values(&x), Moments::from_values(&y));
            let cov = x
                .iter()
                .zip(&y)
                .map(|(a, b)| (a - mx.mean) * (b - my.mean))
                .sum::<f64>()
                / (x.len() as f64 - 1.0);
            stats::cuped::Paired { y: my, x: mx, cov }
        })
        .collect()
}

/// CUPED (Deng, Xu, Kohavi & Walker 2013, WSDM), derived values from shared REFERENCES.md
/// (no published example): θ pooled over both arms = 1.0592885375; raw difference 1.0 (Welch
/// SE 1.0739335796); CUPED difference 1.1059288538 (SE 0.1921614492). With θ equal to the
/// within-arm (ANCOVA) slope, the difference equals the OLS treatment coefficient 1.1065536723.
#[test]
fn cuped_matches_derived_values() {
    let arms = cuped_arms();
    let theta = stats::cuped::pooled_theta(&arms).unwrap();
    assert_close(theta, 1.0592885375, 5e-11, "θ");
    let raw = stats::welch(&arms[0].y, &arms[1].y, 0.05).unwrap();
    assert_close(raw.estimate, 1.0, 1e-12, "raw difference");
    assert_close(raw.se, 1.0739335796, 5e-11, "raw SE");
    let mx = stats::cuped::pooled_x_mean(&arms);
    let (c, t) = (
        stats::cuped::adjust(&arms[0], theta, mx),
        stats::cuped::adjust(&arms[1], theta, mx),
    );
    let adj = stats::welch(&c, &t, 0.05).unwrap();
    assert_close(adj.estimate, 1.1059288538, 5e-11, "CUPED difference");
    assert_close(adj.se, 0.1921614492, 5e-11, "CUPED SE");
    // Identity: with the within-arm slope (what the readout uses) the difference is the
    // ANCOVA coefficient of Y ~ 1 + T + X.
    let within = stats::cuped::within_theta(&arms).unwrap();
    let (c, t) = (
        stats::cuped::adjust(&arms[0], within, mx),
        stats::cuped::adjust(&arms[1], within, mx),
    );
    assert_close(t.mean - c.mean, 1.1065536723, 5e-11, "ANCOVA identity");
}

/// Fisher's exact test. Published: R's `fisher.test` on Fisher's tea-tasting table
/// [[3, 1], [1, 3]] gives two-sided p = 0.4857 (Agresti, "Categorical Data Analysis", 2nd ed.,
/// §3.5.2, Table 3.8); 3/3 vs 0/3 gives p = 0.1 (= 2/20, computed by hand from the
/// hypergeometric distribution: tables 3-0 and 0-3 each have probability 1/20).
#[test]
fn fisher_exact_matches_published_values() {
    let tea = stats::exact::fisher_two_sided(3, 4, 1, 4).unwrap();
    assert_close(tea, 0.4857, 5e-5, "tea tasting");
    let tiny = stats::exact::fisher_two_sided(3, 3, 0, 3).unwrap();
    assert_close(tiny, 0.1, 1e-12, "3/3 vs 0/3");
}

/// Newcombe's hybrid score interval, Newcombe (1998), Statistics in Medicine 17, Table II,
/// method 10 (values recalled from memory, and equal to statsmodels
/// `confint_proportions_2indep(method="newcomb")` to 4 decimals).
#[test]
fn newcombe_interval_matches_published_values() {
    let cases = [
        ((56, 70, 48, 80), (0.0524, 0.3339)),
        ((9, 10, 3, 10), (0.1705, 0.8090)),
        ((6, 7, 2, 7), (0.0582, 0.8062)),
        ((5, 56, 0, 29), (-0.0381, 0.1926)),
        ((0, 10, 0, 20), (-0.1611, 0.2775)),
    ];
    for ((x1, n1, x2, n2), (lo, hi)) in cases {
        let (l, h) = stats::exact::newcombe(x1, n1, x2, n2, 0.05).unwrap();
        assert_close(l, lo, 5e-5, &format!("{x1}/{n1} - {x2}/{n2} low"));
        assert_close(h, hi, 5e-5, &format!("{x1}/{n1} - {x2}/{n2} high"));
    }
}

/// Skewness of a 0/1 sample with k ones in n equals the Bernoulli skewness of p = k/n,
/// (1 − 2p)/√(p(1 − p)) (textbook closed form; g₁ is the population-moment skewness, as
/// scipy.stats.skew with bias=True computes it); and a symmetric sample has skewness 0.
#[test]
fn skewness_matches_the_bernoulli_closed_form() {
    for (k, n) in [(1usize, 4usize), (3, 10), (1, 100), (50, 100)] {
        let v: Vec<f64> = (0..n).map(|i| if i < k { 1.0 } else { 0.0 }).collect();
        let m = Moments::from_values(&v);
        let m3 = v.iter().map(|x| (x - m.mean).powi(3)).sum::<f64>() / n as f64;
        let p = k as f64 / n as f64;
        let want = (1.0 - 2.0 * p) / (p * (1.0 - p)).sqrt();
        assert_close(stats::skewness(&m, m3).unwrap(), want, 1e-12, &format!("{k}/{n}"));
    }
    let m = Moments::from_values(&[1.0, 2.0, 3.0, 4.0, 5.0]);
    assert_close(stats::skewness(&m, 0.0).unwrap(), 0.0, 0.0, "symmetric");
    // No spread, no skewness.
    assert_eq!(
        stats::skewness(&Moments::from_values(&[2.0, 2.0, 2.0]), 0.0),
        None
    );
}
