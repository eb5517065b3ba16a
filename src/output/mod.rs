//! Stage 8, `output`: a readout as a terminal table or as JSON.
//!
//! Formatting only: every number shown was computed by `stats`. The JSON form serialises the
//! readout struct as is, so its keys are those documented in README.md. The table form leads
//! with the headline, fits 100 columns by default (intervals under their estimates, constant
//! columns dropped) and uses fixed decimals per quantity: means to 4 significant digits,
//! differences to 2 significant digits of their interval's half-width, percentages and
//! p-values to fixed places, counts with thousands separators, no exponents mid-table.

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

/// Colour markers: private-use characters that pass `terminal_safe` unchanged and become SGR
/// colour codes (or nothing) only when the text is printed (`colorize`). A catalog name that
/// contains one can at most colour text, never move the cursor.
pub mod mark {
    pub const RED: char = '\u{E000}';
    pub const GREEN: char = '\u{E001}';
    pub const YELLOW: char = '\u{E002}';
    pub const BOLD: char = '\u{E003}';
    pub const CYAN: char = '\u{E004}';
    pub const RESET: char = '\u{E00F}';
}

/// Replaces colour markers by ANSI SGR codes when `enabled`, else removes them.
pub fn colorize(text: &str, enabled: bool) -> std::borrow::Cow<'_, str> {
    let is_mark = |c: char| ('\u{E000}'..='\u{E00F}').contains(&c);
    if !text.chars().any(is_mark) {
        return std::borrow::Cow::Borrowed(text);
    }
    let mut out = String::with_capacity(text.len() + 32);
    for c in text.chars() {
        match c {
            mark::RED if enabled => out.push_str("\x1b[31m"),
            mark::GREEN if enabled => out.push_str("\x1b[32m"),
            mark::YELLOW if enabled => out.push_str("\x1b[33m"),
            mark::BOLD if enabled => out.push_str("\x1b[1m"),
            mark::CYAN if enabled => out.push_str("\x1b[36m"),
            mark::RESET if enabled => out.push_str("\x1b[0m"),
            c if is_mark(c) => {}
            c => out.push(c),
        }
    }
    std::borrow::Cow::Owned(out)
}

fn paint(text: &str, color: Option<char>) -> String {
    match color {
        Some(c) => format!("{c}{text}{}", mark::RESET),
        None => text.to_string(),
    }
}

/// The colour of a verdict: green better, red worse, yellow a change without direction.
fn verdict_color(v: Verdict) -> Option<char> {
    match v {
        Verdict::Better => Some(mark::GREEN),
        Verdict::Worse => Some(mark::RED),
        Verdict::Changed => Some(mark::YELLOW),
        _ => None,
    }
}

/// An integer with thousands separators: 1234567 -> `1,234,567`.
pub fn count(n: u64) -> String {
    let digits = n.to_string();
    let mut out = String::with_capacity(digits.len() + digits.len() / 3);
    for (i, c) in digits.chars().enumerate() {
        if i > 0 && (digits.len() - i).is_multiple_of(3) {
            out.push(',');
        }
        out.push(c);
    }
    out
}

/// `1 unit`, `2 units`.
fn plural(n: u64, one: &str, many: &str) -> String {
    format!("{} {}", count(n), if n == 1 { one } else { many })
}

/// Fixed-point text with `decimals` digits, never an exponent; `-` when not finite.
fn fixed(x: f64, decimals: usize, signed: bool) -> String {
    if !x.is_finite() {
        return "-".into();
    }
    let x = if x == 0.0 { 0.0 } else { x }; // no "-0.000"
    if signed {
        format!("{x:+.decimals$}")
    } else {
        format!("{x:.decimals$}")
    }
}

/// Decimals that show about `digits` significant digits of `scale` (0 to 8).
fn decimals_for(scale: f64, digits: i32) -> usize {
    if !scale.is_finite() || scale == 0.0 {
        return 2;
    }
    (digits - 1 - scale.abs().log10().floor() as i32).clamp(0, 8) as usize
}

fn percent(x: f64, signed: bool) -> String {
    if !x.is_finite() {
        return "-".into();
    }
    let x = if x == 0.0 { 0.0 } else { x };
    if signed {
        format!("{:+.1}%", x * 100.0)
    } else {
        format!("{:.1}%", x * 100.0)
    }
}

fn p_text(p: Option<f64>) -> String {
    match p {
        None => "-".into(),
        Some(p) if p < 1e-4 => "<0.0001".into(),
        Some(p) => format!("{p:.4}"),
    }
}

/// The p-value, followed by the family-adjusted one when the adjustment changed it.
fn p_cell(r: &ResultRow) -> String {
    let Some(d) = r.difference.as_ref() else {
        return "-".into();
    };
    match (d.p_value, d.adjusted_p_value) {
        (Some(p), Some(a)) if (a - p).abs() > 1e-12 => format!("{} ({})", p_text(Some(p)), p_text(Some(a))),
        (p, _) => p_text(p),
    }
}

/// How the readout is laid out on a terminal.
#[derive(Debug, Clone, Copy, Default)]
pub struct TextStyle {
    /// One line per result (about 190 columns) instead of intervals under the estimates.
    pub wide: bool,
}

/// One cell: one or two lines, aligned left or right, optionally coloured.
struct TextCell {
    lines: Vec<String>,
    right: bool,
    color: Option<char>,
}

fn left(lines: Vec<String>) -> TextCell {
    TextCell {
        lines,
        right: false,
        color: None,
    }
}

fn right(lines: Vec<String>) -> TextCell {
    TextCell {
        lines,
        right: true,
        color: None,
    }
}

fn width(s: &str) -> usize {
    unicode_width::UnicodeWidthStr::width(s)
}

/// A borderless table: a header, then groups of rows under a heading line each. Columns are
/// two spaces apart; widths are measured without colour markers.
struct Grid {
    header: Vec<TextCell>,
    groups: Vec<(Option<String>, Vec<Vec<TextCell>>)>,
}

impl Grid {
    fn render(&self) -> String {
        let ncol = self.header.len();
        let mut w = vec![0usize; ncol];
        let all = std::iter::once(&self.header).chain(self.groups.iter().flat_map(|(_, rows)| rows.iter()));
        for row in all {
            for (k, cell) in row.iter().enumerate() {
                for line in &cell.lines {
                    w[k] = w[k].max(width(line));
                }
            }
        }
        let mut out = String::new();
        let line_of = |row: &[TextCell], out: &mut String| {
            let height = row.iter().map(|c| c.lines.len()).max().unwrap_or(1);
            for l in 0..height {
                let mut text = String::from("  ");
                for (k, cell) in row.iter().enumerate() {
                    let s = cell.lines.get(l).map(String::as_str).unwrap_or("");
                    let pad = w[k] - width(s);
                    let painted = if l == 0 {
                        paint(s, cell.color)
                    } else {
                        s.to_string()
                    };
                    if cell.right {
                        text.push_str(&" ".repeat(pad));
                        text.push_str(&painted);
                    } else {
                        text.push_str(&painted);
                        if k + 1 < ncol {
                            text.push_str(&" ".repeat(pad));
                        }
                    }
                    if k + 1 < ncol {
                        text.push_str("  ");
                    }
                }
                out.push_str(text.trim_end());
                out.push('\n');
            }
        };
        line_of(&self.header, &mut out);
        for (heading, rows) in &self.groups {
            if let Some(h) = heading {
                out.push_str(h);
                out.push('\n');
            }
            for row in rows {
                line_of(row, &mut out);
            }
        }
        out
    }
}

/// The interval label of the readout's tables.
fn interval_label(r: &Readout) -> &'static str {
    if r.sequential {
        "always-valid CI"
    } else {
        "adjusted CI"
    }
}

/// Cells of one result in the narrow layout: metric (and arm), control, treatment,
/// difference over its interval, relative over its interval, verdict over the p-values.
fn narrow_cells(r: &ResultRow, with_arm: bool, with_n: bool) -> Vec<TextCell> {
    let scale = [r.control.mean, r.treatment.mean]
        .iter()
        .flatten()
        .fold(0.0f64, |a, b| a.max(b.abs()));
    let dm = decimals_for(scale, 4);
    let mean = |m: Option<f64>| m.map(|m| fixed(m, dm, false)).unwrap_or_else(|| "-".into());
    let mut name = vec![r.metric.clone()];
    if r.power.low_power {
        name.push("(low power)".into());
    }
    let mut cells = vec![left(name)];
    if with_arm {
        cells.push(left(vec![r.arm.clone()]));
    }
    if with_n {
        cells.push(right(vec![format!(
            "{} / {}",
            count(r.control.n),
            count(r.treatment.n)
        )]));
    }
    cells.push(right(vec![mean(r.control.mean)]));
    cells.push(right(vec![mean(r.treatment.mean)]));
    match &r.difference {
        Some(d) => {
            let half = (d.adjusted_ci_high - d.adjusted_ci_low).abs() / 2.0;
            let dd = decimals_for(if half > 0.0 { half } else { d.estimate }, 2);
            cells.push(left(vec![
                fixed(d.estimate, dd, true),
                format!(
                    "[{}, {}]",
                    fixed(d.adjusted_ci_low, dd, true),
                    fixed(d.adjusted_ci_high, dd, true)
                ),
            ]));
        }
        None => cells.push(left(vec!["-".into()])),
    }
    match &r.relative {
        Some(x) => cells.push(left(vec![
            percent(x.estimate, true),
            format!(
                "[{}, {}]",
                percent(x.adjusted_ci_low, true),
                percent(x.adjusted_ci_high, true)
            ),
        ])),
        None => cells.push(left(vec!["-".into()])),
    }
    let mut verdict = vec![verdict_text(r)];
    if let Some(d) = &r.difference {
        let exact = if r.method == "fisher_newcombe" {
            "exact "
        } else {
            ""
        };
        let p = match (d.p_value, d.adjusted_p_value) {
            (Some(p), Some(a)) if (a - p).abs() > 1e-12 => {
                format!("{exact}p {} · adj. {}", p_text(Some(p)), p_text(Some(a)))
            }
            (p, _) => format!("{exact}p {}", p_text(p)),
        };
        verdict.push(p);
    }
    cells.push(TextCell {
        lines: verdict,
        right: false,
        color: verdict_color(r.verdict),
    });
    cells
}

fn verdict_text(r: &ResultRow) -> String {
    match r.verdict {
        Verdict::Better | Verdict::Worse => format!("{} ({})", r.change, r.verdict),
        _ => r.change.to_string(),
    }
}

fn family_heading(r: &ResultRow) -> String {
    match r.role {
        Role::Primary => "primary metrics (Holm)".into(),
        Role::Secondary => "secondary metrics (Benjamini-Hochberg)".into(),
        Role::Guardrail => "guardrails (unadjusted)".into(),
    }
}

fn narrow_header(with_arm: bool, with_n: bool, label: &str) -> Vec<TextCell> {
    let mut h = vec![left(vec!["metric".into()])];
    if with_arm {
        h.push(left(vec!["arm".into()]));
    }
    if with_n {
        h.push(right(vec!["n (ctl / trt)".into()]));
    }
    h.push(right(vec!["control".into()]));
    h.push(right(vec!["treatment".into()]));
    h.push(left(vec!["difference".into(), format!("[{label}]")]));
    h.push(left(vec!["relative".into(), format!("[{label}]")]));
    h.push(left(vec!["verdict".into()]));
    h
}

/// True when some row's unit count differs from its arms' unit counts (the n column then
/// carries information; otherwise the arms line says it once).
fn n_varies(r: &Readout, rows: &[&ResultRow]) -> bool {
    let units = |arm: &str| r.arms.iter().find(|a| a.name == arm).map(|a| a.units);
    rows.iter()
        .any(|x| Some(x.control.n) != units(&r.control) || Some(x.treatment.n) != units(&x.arm))
}

fn narrow_main(r: &Readout, with_arm: bool) -> String {
    let rows: Vec<&ResultRow> = r.results.iter().filter(|x| x.segment.is_none()).collect();
    let with_n = n_varies(r, &rows);
    let mut groups: Vec<(Option<String>, Vec<Vec<TextCell>>)> = Vec::new();
    for role in [Role::Primary, Role::Secondary, Role::Guardrail] {
        let mine: Vec<&&ResultRow> = rows.iter().filter(|x| x.role == role).collect();
        if let Some(first) = mine.first() {
            groups.push((
                Some(family_heading(first)),
                mine.iter().map(|x| narrow_cells(x, with_arm, with_n)).collect(),
            ));
        }
    }
    Grid {
        header: narrow_header(with_arm, with_n, interval_label(r)),
        groups,
    }
    .render()
}

fn narrow_segments(r: &Readout, rows: &[&ResultRow], with_arm: bool) -> String {
    let mut groups: Vec<(Option<String>, Vec<Vec<TextCell>>)> = Vec::new();
    for x in rows {
        let s = x.segment.as_ref().expect("segment rows");
        let heading = format!(
            "{} = {}  (n {} / {}{})",
            s.name,
            s.value.as_deref().unwrap_or("(none)"),
            count(x.control.n),
            count(x.treatment.n),
            if x.exploratory { ", exploratory" } else { "" }
        );
        if groups
            .last()
            .is_none_or(|(h, _)| h.as_deref() != Some(heading.as_str()))
        {
            groups.push((Some(heading), Vec::new()));
        }
        groups
            .last_mut()
            .expect("pushed above")
            .1
            .push(narrow_cells(x, with_arm, false));
    }
    Grid {
        header: narrow_header(with_arm, false, interval_label(r)),
        groups,
    }
    .render()
}

fn wide_cells(r: &ResultRow) -> Vec<Cell> {
    let mean = |m: Option<f64>| m.map(|m| sig(m, 4)).unwrap_or_else(|| "-".into());
    let diff = r
        .difference
        .as_ref()
        .map(|d| {
            format!(
                "{} [{}, {}]",
                sig(d.estimate, 3),
                sig(d.adjusted_ci_low, 3),
                sig(d.adjusted_ci_high, 3)
            )
        })
        .unwrap_or_else(|| "-".into());
    let rel = r
        .relative
        .as_ref()
        .map(|d| {
            format!(
                "{} [{}, {}]",
                pct(d.estimate),
                pct(d.adjusted_ci_low),
                pct(d.adjusted_ci_high)
            )
        })
        .unwrap_or_else(|| "-".into());
    vec![
        Cell::new(&r.metric),
        Cell::new(r.role.as_str()),
        Cell::new(&r.arm),
        Cell::new(format!("{} / {}", count(r.control.n), count(r.treatment.n)))
            .set_alignment(CellAlignment::Right),
        Cell::new(mean(r.control.mean)).set_alignment(CellAlignment::Right),
        Cell::new(mean(r.treatment.mean)).set_alignment(CellAlignment::Right),
        Cell::new(diff).set_alignment(CellAlignment::Right),
        Cell::new(p_cell(r)).set_alignment(CellAlignment::Right),
        Cell::new(rel).set_alignment(CellAlignment::Right),
        Cell::new(if r.power.low_power {
            format!("{}, low power", verdict_text(r))
        } else {
            verdict_text(r)
        }),
        Cell::new(
            r.cuped
                .as_ref()
                .map(|c| format!("{}%", sig(c.variance_reduction * 100.0, 2)))
                .unwrap_or_else(|| "-".into()),
        )
        .set_alignment(CellAlignment::Right),
    ]
}

fn wide_table(r: &Readout, rows: &[&ResultRow], segments: bool) -> String {
    let label = interval_label(r);
    let mut table = Table::new();
    let mut header = Vec::new();
    if segments {
        header.extend(["segment".to_string(), "value".into()]);
    }
    header.extend([
        "metric".to_string(),
        "role".into(),
        "arm".into(),
        "n (ctl / trt)".into(),
        "control".into(),
        "treatment".into(),
        format!("difference [{label}]"),
        "p (adjusted)".into(),
        format!("relative [{label}]"),
        "verdict".into(),
        "CUPED".into(),
    ]);
    table
        .load_preset(presets::UTF8_FULL_CONDENSED)
        .set_content_arrangement(ContentArrangement::Disabled)
        .set_header(header);
    for row in rows {
        let mut cells = Vec::new();
        if let Some(s) = &row.segment {
            cells.push(Cell::new(&s.name));
            cells.push(Cell::new(s.value.as_deref().unwrap_or("(none)")));
        }
        cells.extend(wide_cells(row));
        table.add_row(cells);
    }
    table.to_string() + "\n"
}

/// Word-wraps `text` at `max` columns after the prefix `first`; continuation lines start
/// with `indent`.
fn wrap(text: &str, max: usize, first: &str, indent: &str) -> String {
    let mut out = String::new();
    let mut line = first.to_string();
    let mut empty = true;
    for word in text.split(' ') {
        if !empty && width(&line) + 1 + width(word) > max {
            out.push_str(line.trim_end());
            out.push('\n');
            line = indent.to_string();
            empty = true;
        }
        if !empty {
            line.push(' ');
        }
        line.push_str(word);
        empty = false;
    }
    out.push_str(line.trim_end());
    out.push('\n');
    out
}

/// Width the prose of the readout is wrapped to.
const TEXT_WIDTH: usize = 98;

/// The readout as text for a terminal: headline, arms, results, segments, cautions,
/// assumptions. The default layout fits 100 columns for two arms and short metric names.
pub fn readout_text(r: &Readout, style: &TextStyle) -> String {
    let mut out = String::new();
    for line in &r.headline {
        let failed = ["VOID", "GUARDRAIL FAILED", "CHECK FAILED"]
            .iter()
            .any(|p| line.starts_with(p));
        let color = if failed { Some(mark::RED) } else { None };
        let text = wrap(line, TEXT_WIDTH, "", "  ");
        match color {
            Some(c) => out.push_str(&format!("{}{c}{text}{}", mark::BOLD, mark::RESET)),
            None => out.push_str(&text),
        }
    }
    out.push('\n');
    out.push_str(&format!(
        "Experiment {} (control: {}), {} to {}\n",
        r.experiment, r.control, r.start, r.end
    ));
    let arms: Vec<String> = r
        .arms
        .iter()
        .map(|a| match a.planned_share {
            Some(s) => format!(
                "{} {} (planned {})",
                a.name,
                plural(a.units, "unit", "units"),
                pct(s)
            ),
            None => format!("{} {} (not in split)", a.name, plural(a.units, "unit", "units")),
        })
        .collect();
    out.push_str(&wrap(&arms.join(", "), TEXT_WIDTH, "Arms: ", "  "));
    match &r.sample_ratio {
        Some(s) => out.push_str(&format!(
            "Sample ratio: chi-square {} (df {}), p = {} -> {}\n",
            sig(s.chi_square, 4),
            s.df,
            p_text(Some(s.p_value)),
            if s.mismatch {
                format!("{}{}MISMATCH{}", mark::BOLD, mark::RED, mark::RESET)
            } else {
                "ok".into()
            }
        )),
        None => out.push_str("Sample ratio: not checked\n"),
    }
    if let Some(on) = &r.computed_on {
        out.push_str(&format!("Computed on: {on}\n"));
    }
    let ex = &r.excluded;
    out.push_str(&format!(
        "Excluded units: {} in several arms, {} without arm, {} in unknown arms\n\n",
        count(ex.multiple_arms),
        count(ex.missing_arm),
        count(ex.unknown_arm)
    ));
    let with_arm = r.arms.iter().filter(|a| a.planned_share.is_some()).count() > 2;
    let main: Vec<&ResultRow> = r.results.iter().filter(|x| x.segment.is_none()).collect();
    if style.wide {
        out.push_str(&wide_table(r, &main, false));
    } else {
        out.push_str(&narrow_main(r, with_arm));
    }
    let level = (1.0 - r.alpha) * 100.0;
    let conf = if level.fract() == 0.0 {
        format!("{level:.0}%")
    } else {
        format!("{}%", sig(level, 3))
    };
    let note = if r.sequential {
        format!(
            "Intervals are always-valid {conf} confidence sequences (mixture SPRT), widened like the verdicts for multiple testing: primary metrics at Holm's step-down levels, secondary metrics and segments at Benjamini-Yekutieli false-coverage levels, guardrails unadjusted. p: raw, then adjusted within the family."
        )
    } else {
        format!(
            "Intervals are at the level the verdict uses: primary metrics at Holm's step-down levels, secondary metrics and segments at Benjamini-Yekutieli false-coverage levels, guardrails at {conf} (unadjusted); raw {conf} intervals are in --format json. p: raw, then adjusted within the family."
        )
    };
    out.push('\n');
    out.push_str(&wrap(&note, TEXT_WIDTH, "", ""));
    let cuped: Vec<String> = main
        .iter()
        .filter_map(|x| {
            x.cuped
                .as_ref()
                .map(|c| format!("{} {}%", x.metric, sig(c.variance_reduction * 100.0, 2)))
        })
        .collect();
    if !cuped.is_empty() && !style.wide {
        out.push_str(&wrap(
            &cuped.join(", "),
            TEXT_WIDTH,
            "CUPED (variance removed): ",
            "  ",
        ));
    }
    let segment_rows: Vec<&ResultRow> = r
        .results
        .iter()
        .filter(|x| x.segment.is_some() && x.role == Role::Primary)
        .collect();
    if !segment_rows.is_empty() {
        out.push_str("\nSegments (drill-down of primary metrics; every metric is in --format json):\n");
        if style.wide {
            out.push_str(&wide_table(r, &segment_rows, true));
        } else {
            out.push_str(&narrow_segments(r, &segment_rows, with_arm));
        }
    }
    if !r.cautions.is_empty() {
        out.push_str("\nCautions:\n");
        for c in &r.cautions {
            out.push_str(&wrap(c, TEXT_WIDTH, "  ! ", "    "));
        }
    }
    out.push_str("\nAssumptions:\n");
    for a in &r.assumptions {
        out.push_str(&wrap(a, TEXT_WIDTH, "  - ", "    "));
    }
    out
}

/// The readout as pretty JSON (stable keys; see README.md).
pub fn readout_json(r: &Readout) -> String {
    serde_json::to_string_pretty(r).expect("a readout always serialises") + "\n"
}

#[cfg(test)]
mod tests {
    use super::{count, fixed, sig, wrap};

    #[test]
    fn counts_and_fixed_decimals() {
        assert_eq!(count(0), "0");
        assert_eq!(count(999), "999");
        assert_eq!(count(1000), "1,000");
        assert_eq!(count(1234567), "1,234,567");
        assert_eq!(fixed(-0.0, 3, true), "+0.000");
        assert_eq!(fixed(1e12, 1, false), "1000000000000.0");
    }

    #[test]
    fn wrapping_respects_the_width() {
        let text = "one two three four five six seven eight nine ten";
        let w = wrap(text, 20, "  ! ", "    ");
        assert!(w.lines().all(|l| l.len() <= 20), "{w}");
        assert_eq!(w.split_whitespace().filter(|x| *x != "!").count(), 10);
    }

    #[test]
    fn significant_digits() {
        assert_eq!(sig(1234.5678, 4), "1235");
        assert_eq!(sig(0.012345, 3), "0.0123");
        assert_eq!(sig(-2.5, 3), "-2.50");
        assert_eq!(sig(f64::NAN, 3), "-");
    }
}
