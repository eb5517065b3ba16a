//! Every generated column and CTE name, built (and read back) in one place.
//!
//! The readout query's per-unit columns, its covariate, covariance and cap columns, the
//! statistics table's `<column>__n` / `__mean` / `__var` / `__m3` columns and the fixed result columns
//! are a protocol between `plan`, `render`, the templates and `execute` (which reads the
//! statistics table back, also from a warehouse export). Writing the names here, and nowhere
//! else, keeps that protocol in one file: a renamed column is one change, and the reader can
//! never look for a name the writer does not produce. The templates spell the fixed result
//! columns literally; `execute::stats_table` fails on any that is missing.

/// Result column: the arm.
pub const ARM: &str = "arm";
/// Result column: the segment of a slice (NULL on overall rows).
pub const SEGMENT_NAME: &str = "segment_name";
/// Result column: the segment value of a slice.
pub const SEGMENT_VALUE: &str = "segment_value";
/// Result column: units in the arm (or slice).
pub const UNITS: &str = "units";
/// Result columns: exclusion counts (same on every row).
pub const EXCLUDED_MULTIPLE_ARMS: &str = "excluded_multiple_arms";
pub const EXCLUDED_MISSING_ARM: &str = "excluded_missing_arm";
pub const EXCLUDED_ROWS_WITHOUT_UNIT: &str = "excluded_rows_without_unit";
/// Result column: the query's fingerprint (see `plan::fingerprint`).
pub const FINGERPRINT: &str = "plumb_fingerprint";
/// Result column: the statistics layout version (see `plan::STATS_LAYOUT`).
pub const LAYOUT: &str = "plumb_layout";

/// Column names of plumb's own per-unit and statistics tables, which no metric may take
/// (metric names become per-unit columns).
pub const RESERVED: &[&str] = &[
    "unit_id",
    ARM,
    SEGMENT_NAME,
    SEGMENT_VALUE,
    UNITS,
    EXCLUDED_MULTIPLE_ARMS,
    EXCLUDED_MISSING_ARM,
    EXCLUDED_ROWS_WITHOUT_UNIT,
    FINGERPRINT,
    LAYOUT,
];

/// The per-unit column of an event metric: the metric's own name.
pub fn metric(name: &str) -> String {
    name.to_string()
}

/// The pre-exposure covariate of a per-unit column.
pub fn covariate(column: &str) -> String {
    format!("{column}__pre")
}

/// The covariance of two per-unit columns (per arm).
pub fn covariance(a: &str, b: &str) -> String {
    format!("{a}__cov__{b}")
}

/// The percentile cap of a winsorized per-unit column.
pub fn cap(column: &str) -> String {
    format!("{column}__cap")
}

/// The per-unit column holding a segment's value.
pub fn segment(name: &str) -> String {
    format!("segment__{name}")
}

/// The arm's mean of a per-unit column, beside each per-unit row (the centre of the third
/// moment; a window column of the final `SELECT`, never in the result).
pub fn centre(column: &str) -> String {
    format!("{column}__centre")
}

/// The CTE of one pass over an event table.
pub fn scan(table: &str) -> String {
    format!("scan_{table}")
}

/// The CTE of a unit-attribute segment.
pub fn segment_cte(name: &str) -> String {
    format!("segment_{name}")
}

/// A moment of a per-unit column in the statistics table.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Stat {
    /// Units with a value (`count`).
    N,
    /// `avg`.
    Mean,
    /// `var_samp`.
    Var,
    /// The third central moment `avg((x - mean)³)` (population form; overall rows only), from
    /// which the heavy-tails check takes the skewness. Statistics layout 2 and later.
    M3,
}

/// The statistics-table column of a moment of `column`.
pub fn stat(column: &str, stat: Stat) -> String {
    let suffix = match stat {
        Stat::N => "n",
        Stat::Mean => "mean",
        Stat::Var => "var",
        Stat::M3 => "m3",
    };
    format!("{column}__{suffix}")
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn names_are_the_documented_protocol() {
        assert_eq!(covariate("orders"), "orders__pre");
        assert_eq!(covariance("revenue", "orders"), "revenue__cov__orders");
        assert_eq!(stat("orders__pre", Stat::Var), "orders__pre__var");
        assert_eq!(cap("revenue"), "revenue__cap");
        assert_eq!(stat("revenue", Stat::M3), "revenue__m3");
        assert_eq!(centre("revenue"), "revenue__centre");
        assert_eq!(segment("region"), "segment__region");
        assert_eq!(scan("orders"), "scan_orders");
        assert_eq!(segment_cte("region"), "segment_region");
    }
}
