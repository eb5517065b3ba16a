//! Stage 8, `output`: a readout as a terminal table or as JSON.
//!
//! Formatting only: every number shown was computed by `stats`. The JSON form serialises the
//! readout struct as is, so its keys are those documented in README.md.

use crate::ir::Role;
use crate::stats::readout::{Readout, ResultRow, Verdict};

pub mod power;
use comfy_table::{Cell, CellAlignment, ContentArrangement, Table, presets};

/// A number with about `digits` significant digits, without exponent for ordinary sizes.
pub fn sig(x: f64, digits: usize) -> String {
    if !x.is_finite() {
        return "-".into();
    }
    if x == 0.0 {
        return "0".into();
    }
    let magnitude = x.abs().log10().floor() as i32;
    if !(-4..=9).contains(&magnitude) {
        return format!("{:.*e}", digits.saturating_sub(1), x);
    }
    let decimals = (digits as i32 - 1 - magnitude).max(0) as usize;
    format!("{x:.decimals$}")
}

fn pct(x: f64) -> String {
    format!("{}%", sig(x * 100.0, 3))
}

fn p_value(p: Option<f64>) -> String {
    match p {
        None => "-".into(),
        Some(p) if p < 1e-4 => "<0.0001".into(),
        Some(p) => format!("{p:.4}"),
    }
}

fn row_cells(r: &ResultRow) -> Vec<Cell> {
    let mean = |m: Option<f64>| m.map(|m| sig(m, 4)).unwrap_or_else(|| "-".into());
    let diff = r
        .difference
        .as_ref()
        .map(|d| {
            format!(
                "{} [{}, {}]",
                sig(d.estimate, 3),
                sig(d.ci_low, 3),
                sig(d.ci_high, 3)
            )
        })
        .unwrap_or_else(|| "-".into());
    let rel = r
        .relative
        .as_ref()
        .map(|d| format!("{} [{}, {}]", pct(d.estimate), pct(d.ci_low), pct(d.ci_high)))
        .unwrap_or_else(|| "-".into());
    let change = match r.verdict {
        Verdict::Better | Verdict::Worse => format!("{} ({})", r.change, r.verdict),
        _ => r.change.to_string(),
    };
    vec![
        Cell::new(&r.metric),
        Cell::new(r.role.as_str()),
        Cell::new(&r.arm),
        Cell::new(format!("{} / {}", r.control.n, r.treatment.n)).set_alignment(CellAlignment::Right),
        Cell::new(mean(r.control.mean)).set_alignment(CellAlignment::Right),
        Cell::new(mean(r.treatment.mean)).set_alignment(CellAlignment::Right),
        Cell::new(diff).set_alignment(CellAlignment::Right),
        Cell::new(p_cell(r)).set_alignment(CellAlignment::Right),
        Cell::new(rel).set_alignment(CellAlignment::Right),
        Cell::new(change),
        Cell::new(
            r.cuped
                .as_ref()
                .map(|c| format!("{}%", sig(c.variance_reduction * 100.0, 2)))
                .unwrap_or_else(|| "-".into()),
        )
        .set_alignment(CellAlignment::Right),
    ]
}

/// The p-value, followed by the family-adjusted one when the adjustment changed it.
fn p_cell(r: &ResultRow) -> String {
    let Some(d) = r.difference.as_ref() else {
        return "-".into();
    };
    match (d.p_value, d.adjusted_p_value) {
        (Some(p), Some(a)) if (a - p).abs() > 1e-12 => format!("{} ({})", p_value(Some(p)), p_value(Some(a))),
        (p, _) => p_value(p),
    }
}

/// The readout as text for a terminal: header, arms, results table, assumptions, cautions.
pub fn readout_text(r: &Readout) -> String {
    let mut out = String::new();
    out.push_str(&format!(
        "Experiment {} (control: {}), {} to {}\n",
        r.experiment, r.control, r.start, r.end
    ));
    let arms: Vec<String> = r
        .arms
        .iter()
        .map(|a| match a.planned_share {
            Some(s) => format!("{} {} units (planned {})", a.name, a.units, pct(s)),
            None => format!("{} {} units (not in split)", a.name, a.units),
        })
        .collect();
    out.push_str(&format!("Arms: {}\n", arms.join(", ")));
    match &r.sample_ratio {
        Some(s) => out.push_str(&format!(
            "Sample ratio: chi-square {} (df {}), p = {} -> {}\n",
            sig(s.chi_square, 4),
            s.df,
            p_value(Some(s.p_value)),
            if s.mismatch { "MISMATCH" } else { "ok" }
        )),
        None => out.push_str("Sample ratio: not checked\n"),
    }
    let ex = &r.excluded;
    out.push_str(&format!(
        "Excluded units: {} in several arms, {} without arm, {} in unknown arms\n\n",
        ex.multiple_arms, ex.missing_arm, ex.unknown_arm
    ));
    let level = (1.0 - r.alpha) * 100.0;
    let conf = if level.fract() == 0.0 {
        format!("{level:.0}% CI")
    } else {
        format!("{}% CI", sig(level, 3))
    };
    let mut table = Table::new();
    table
        .load_preset(presets::UTF8_FULL_CONDENSED)
        .set_content_arrangement(ContentArrangement::Disabled)
        .set_header(vec![
            "metric".to_string(),
            "role".into(),
            "arm".into(),
            "n (ctl / trt)".into(),
            "control".into(),
            "treatment".into(),
            format!("difference [{conf}]"),
            "p".into(),
            format!("relative [{conf}]"),
            "change".into(),
            "CUPED".into(),
        ]);
    for row in r.results.iter().filter(|x| x.segment.is_none()) {
        table.add_row(row_cells(row));
    }
    out.push_str(&table.to_string());
    out.push_str(
        "\np: raw (adjusted within the row's family when different). Families: primary metrics (Holm), secondary\nmetrics and segment rows (Benjamini-Hochberg), guardrails (unadjusted). CUPED: variance removed by the covariate.\n",
    );
    let segment_rows: Vec<&ResultRow> = r
        .results
        .iter()
        .filter(|x| x.segment.is_some() && x.role == Role::Primary)
        .collect();
    if !segment_rows.is_empty() {
        out.push_str("\nSegments (drill-down of primary metrics; every metric is in --format json):\n");
        let mut seg = Table::new();
        seg.load_preset(presets::UTF8_FULL_CONDENSED)
            .set_content_arrangement(ContentArrangement::Disabled)
            .set_header(vec![
                "segment".to_string(),
                "value".into(),
                "metric".into(),
                "arm".into(),
                "n (ctl / trt)".into(),
                "control".into(),
                "treatment".into(),
                format!("difference [{conf}]"),
                "p".into(),
                format!("relative [{conf}]"),
                "change".into(),
            ]);
        for row in segment_rows {
            let s = row.segment.as_ref().expect("filtered");
            let mut cells = vec![
                Cell::new(&s.name),
                Cell::new(s.value.as_deref().unwrap_or("(none)")),
            ];
            let mut rest = row_cells(row);
            rest.remove(1); // role: all primary here
            rest.pop(); // CUPED column: shown once, in the main table
            cells.extend(rest);
            seg.add_row(cells);
        }
        out.push_str(&seg.to_string());
        out.push('\n');
    }
    if !r.cautions.is_empty() {
        out.push_str("\nCautions:\n");
        for c in &r.cautions {
            out.push_str(&format!("  ! {c}\n"));
        }
    }
    out.push_str("\nAssumptions:\n");
    for a in &r.assumptions {
        out.push_str(&format!("  - {a}\n"));
    }
    out
}

/// The readout as pretty JSON (stable keys; see README.md).
pub fn readout_json(r: &Readout) -> String {
    serde_json::to_string_pretty(r).expect("a readout always serialises") + "\n"
}

#[cfg(test)]
mod tests {
    use super::sig;

    #[test]
    fn significant_digits() {
        assert_eq!(sig(1234.5678, 4), "1235");
        assert_eq!(sig(0.012345, 3), "0.0123");
        assert_eq!(sig(-2.5, 3), "-2.50");
        assert_eq!(sig(f64::NAN, 3), "-");
    }
}
