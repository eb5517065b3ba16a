//! Syntax structs: the catalog and workspace files exactly as written.
//!
//! These mirror the YAML keys one to one (the keys are a contract with users) and hold raw
//! strings; checking names, units, windows and SQL is the resolver's job. Every field is
//! optional here so that a missing key becomes a located "missing key" diagnostic in the
//! resolver rather than a serde error that stops at the first problem.

use schemars::{JsonSchema, Schema, SchemaGenerator, json_schema};
use serde::de::{self, Deserializer, MapAccess, Visitor};
use serde::{Deserialize, Serialize};
use std::borrow::Cow;
use std::fmt;

/// A scalar written as a string, number or boolean, kept as its text (`14d`, `0`, `99.9%`).
#[derive(Debug, Clone, PartialEq, Serialize)]
#[serde(transparent)]
pub struct Scalar(pub String);

impl<'de> Deserialize<'de> for Scalar {
    fn deserialize<D: Deserializer<'de>>(d: D) -> Result<Self, D::Error> {
        struct V;
        impl Visitor<'_> for V {
            type Value = Scalar;
            fn expecting(&self, f: &mut fmt::Formatter) -> fmt::Result {
                f.write_str("a string or a number")
            }
            fn visit_str<E: de::Error>(self, v: &str) -> Result<Scalar, E> {
                Ok(Scalar(v.to_string()))
            }
            fn visit_i64<E: de::Error>(self, v: i64) -> Result<Scalar, E> {
                Ok(Scalar(v.to_string()))
            }
            fn visit_u64<E: de::Error>(self, v: u64) -> Result<Scalar, E> {
                Ok(Scalar(v.to_string()))
            }
            fn visit_f64<E: de::Error>(self, v: f64) -> Result<Scalar, E> {
                Ok(Scalar(v.to_string()))
            }
            fn visit_bool<E: de::Error>(self, v: bool) -> Result<Scalar, E> {
                Ok(Scalar(v.to_string()))
            }
        }
        d.deserialize_any(V)
    }
}

impl JsonSchema for Scalar {
    fn schema_name() -> Cow<'static, str> {
        "Scalar".into()
    }
    fn json_schema(_: &mut SchemaGenerator) -> Schema {
        json_schema!({ "type": ["string", "number", "boolean"] })
    }
}

impl<V: JsonSchema> JsonSchema for OrderedMap<V> {
    fn schema_name() -> Cow<'static, str> {
        format!("MapOf{}", V::schema_name()).into()
    }
    fn json_schema(generator: &mut SchemaGenerator) -> Schema {
        json_schema!({ "type": "object", "additionalProperties": generator.subschema_for::<V>() })
    }
}

/// A YAML mapping kept in source order (`split: {control: 50, treatment: 50}`).
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct OrderedMap<V>(pub Vec<(String, V)>);

impl<'de, V: Deserialize<'de>> Deserialize<'de> for OrderedMap<V> {
    fn deserialize<D: Deserializer<'de>>(d: D) -> Result<Self, D::Error> {
        struct Mv<V>(std::marker::PhantomData<V>);
        impl<'de, V: Deserialize<'de>> Visitor<'de> for Mv<V> {
            type Value = OrderedMap<V>;
            fn expecting(&self, f: &mut fmt::Formatter) -> fmt::Result {
                f.write_str("a mapping")
            }
            fn visit_map<A: MapAccess<'de>>(self, mut map: A) -> Result<Self::Value, A::Error> {
                let mut out = Vec::new();
                while let Some((k, v)) = map.next_entry::<Scalar, V>()? {
                    out.push((k.0, v));
                }
                Ok(OrderedMap(out))
            }
        }
        d.deserialize_map(Mv(std::marker::PhantomData))
    }
}

/// `plumb.yaml`.
#[derive(Debug, Clone, Default, Deserialize, Serialize, JsonSchema)]
#[schemars(deny_unknown_fields)]
pub struct WorkspaceFile {
    /// Folder (relative to plumb.yaml) holding the catalog's YAML files.
    pub catalog: Option<String>,
    /// Default SQL dialect of `plumb sql` and `check` (default: duckdb).
    pub dialect: Option<String>,
    /// The local data the embedded engine reads: tables from files, or a DuckDB database.
    pub local: Option<LocalData>,
    /// Lint severities: rule code or name -> `off`, `warning` or `error`.
    pub lint: Option<OrderedMap<String>>,
    /// Named engines: where `--engine NAME` runs the SQL.
    pub engines: Option<OrderedMap<EngineDecl>>,
    /// The engine of commands run without `--engine` (default: the local DuckDB).
    pub default_engine: Option<String>,
}

pub const WORKSPACE_KEYS: &[&str] = &["catalog", "dialect", "local", "lint", "engines", "default_engine"];
pub const ENGINE_KEYS: &[&str] = &[
    "duckdb",
    "dialect",
    "url",
    "command",
    "output",
    "timeout",
    "description",
];

/// One named engine under `engines:` in plumb.yaml: the local DuckDB (`duckdb: {}`), a
/// PostgreSQL server (`url:`), or a command-line client (`command:`) that runs a SQL file and
/// prints the result with a header.
#[derive(Debug, Clone, Default, Deserialize, Serialize, JsonSchema)]
#[schemars(deny_unknown_fields)]
pub struct EngineDecl {
    /// The embedded DuckDB over the workspace's `local:` data: `duckdb: {}`.
    pub duckdb: Option<EmptyMap>,
    /// The SQL dialect the engine speaks (`postgres`, `spark`, `snowflake`, ...).
    pub dialect: Option<String>,
    /// A PostgreSQL connection URL, `postgres://USER@HOST:PORT/DB` (password from the
    /// environment or the password file, never here).
    pub url: Option<String>,
    /// The client's argv, run without a shell; `{sql_file}` is replaced by the path of the
    /// compiled statement (without it, the statement is written to the client's stdin).
    pub command: Option<Vec<String>>,
    /// How the client prints the result on stdout: `csv` (default) or `tsv`, with a header.
    pub output: Option<String>,
    /// How long one statement may run before plumb stops the client, e.g. `30m`, `2h`.
    pub timeout: Option<String>,
    /// What this engine is, for people.
    pub description: Option<String>,
}

/// An empty mapping (`{}`).
#[derive(Debug, Clone, Default, Deserialize, Serialize, JsonSchema)]
#[schemars(deny_unknown_fields)]
pub struct EmptyMap {}
pub const LOCAL_KEYS: &[&str] = &["database", "tables", "threads", "memory_limit", "temp_directory"];

/// `local:` in `plumb.yaml`: a DuckDB file and/or table name -> CSV/Parquet/JSON path or glob,
/// and how the local engine runs.
#[derive(Debug, Clone, Default, Deserialize, Serialize, JsonSchema)]
#[schemars(deny_unknown_fields)]
pub struct LocalData {
    /// A DuckDB database file whose tables are the local data.
    pub database: Option<String>,
    /// Table name -> CSV, Parquet or JSON file (or glob such as `data/orders/*.parquet`).
    pub tables: Option<OrderedMap<String>>,
    /// Worker threads of the local engine (default: every core). Results are the same for
    /// any value.
    pub threads: Option<u32>,
    /// Memory limit of the local engine, e.g. `4GB` (default: 80% of memory); beyond it,
    /// large operators spill to `temp_directory`.
    pub memory_limit: Option<String>,
    /// Folder the local engine spills to (default: in the system's temporary directory).
    pub temp_directory: Option<String>,
}

#[derive(Debug, Clone, Deserialize, Serialize, JsonSchema)]
#[schemars(deny_unknown_fields)]
pub struct Unit {
    /// The unit's name (snake_case), e.g. `shopper`.
    pub name: Option<String>,
    /// What one unit is, in a sentence.
    pub description: Option<String>,
    /// What makes a unit active in a report period: `{events: visits}`.
    pub active: Option<Active>,
}

#[derive(Debug, Clone, Deserialize, Serialize, JsonSchema)]
#[schemars(deny_unknown_fields)]
pub struct Active {
    /// Event table whose rows make a unit active in a report period.
    pub events: Option<String>,
}

#[derive(Debug, Clone, Deserialize, Serialize, JsonSchema)]
#[schemars(deny_unknown_fields)]
pub struct EventTable {
    /// The event table's name (snake_case), used by metrics' `events:`.
    pub name: Option<String>,
    /// What one row is.
    pub description: Option<String>,
    /// The unit each row belongs to.
    pub unit: Option<String>,
    /// The warehouse table (`schema.table`) holding the rows; or give `sql`.
    pub table: Option<String>,
    /// A read-only query giving the rows, instead of `table`.
    pub sql: Option<String>,
    /// Column holding the unit's id.
    pub id: Option<String>,
    /// Column holding the event's timestamp (UTC when without a zone).
    pub time: Option<String>,
    /// SQL condition every row must meet (e.g. `not is_test`).
    #[serde(rename = "where")]
    pub where_: Option<String>,
    /// Optional list of the table's columns; SQL fragments are checked against it.
    pub columns: Option<Vec<String>>,
}

#[derive(Debug, Clone, Deserialize, Serialize, JsonSchema)]
#[schemars(deny_unknown_fields)]
pub struct ExposureLog {
    /// The exposure log's name, used by experiments' `exposure_log:`.
    pub name: Option<String>,
    /// What one row records.
    pub description: Option<String>,
    /// The unit that is exposed (randomised).
    pub unit: Option<String>,
    /// The warehouse table holding the exposure rows; or give `sql`.
    pub table: Option<String>,
    /// A read-only query giving the exposure rows, instead of `table`.
    pub sql: Option<String>,
    /// Column holding the unit's id.
    pub id: Option<String>,
    /// Column holding the exposure timestamp.
    pub time: Option<String>,
    /// Column naming the experiment (matched against each experiment's `logged_as`).
    pub experiment: Option<String>,
    /// Column naming the arm (matched against each experiment's `split`).
    pub arm: Option<String>,
}

#[derive(Debug, Clone, Deserialize, Serialize, JsonSchema)]
#[schemars(deny_unknown_fields)]
pub struct Segment {
    /// The segment's name, used by experiments' `segments:` and `--by`.
    pub name: Option<String>,
    /// What the segment splits units by.
    pub description: Option<String>,
    /// The unit the attribute belongs to.
    pub unit: Option<String>,
    /// Table holding the attribute, one row per unit (or per unit and time with `time`).
    pub table: Option<String>,
    /// Column of `table` holding the unit's id.
    pub id: Option<String>,
    /// SQL giving the segment's value from a row of `table`.
    pub value: Option<String>,
    /// Column of `table` with the time a value starts to hold (the value at first exposure is used).
    pub time: Option<String>,
    /// Instead of a table: a column of the exposure log, as recorded at first exposure.
    pub from_exposure: Option<String>,
}

#[derive(Debug, Clone, Deserialize, Serialize, JsonSchema)]
#[schemars(deny_unknown_fields)]
pub struct Metric {
    /// The metric's name (snake_case).
    pub name: Option<String>,
    /// What one unit's value means.
    pub description: Option<String>,
    /// Who answers for the definition (a team).
    pub owner: Option<String>,
    /// Event table the metric aggregates.
    pub events: Option<String>,
    /// How a unit's events become one number: count, sum, distinct, any, min, max or at_least.
    pub per_unit: Option<String>,
    /// SQL value aggregated by sum, distinct, min and max (e.g. `amount_cents / 100.0`).
    pub of: Option<String>,
    /// SQL condition on the events that count.
    #[serde(rename = "where")]
    pub where_: Option<String>,
    /// `[start, end]` relative to first exposure, half-open, e.g. `[0d, 7d]` (default: until the experiment's end).
    pub window: Option<Vec<Scalar>>,
    /// Cap per-unit values: a percentile of exposed units (`99.9%`) or an absolute value (`500`).
    pub winsorize: Option<Scalar>,
    /// With `per_unit: at_least`: the number of events a unit needs for a 1.
    pub at_least: Option<u64>,
    /// `[numerator, denominator]`: a ratio of two metrics' sums over units.
    pub ratio: Option<Vec<String>>,
    /// `increase` or `decrease`: which way is good. Used by guardrails.
    pub direction: Option<String>,
    /// Minimum detectable effect worth detecting, relative: `2%`.
    pub mde: Option<Scalar>,
}

#[derive(Debug, Clone, Deserialize, Serialize, JsonSchema)]
#[schemars(deny_unknown_fields)]
pub struct Experiment {
    /// The experiment's name (snake_case), used by `plumb analyze NAME`.
    pub name: Option<String>,
    /// What is being tried, and why.
    pub description: Option<String>,
    /// The exposure log recording who saw which arm.
    pub exposure_log: Option<String>,
    /// Deprecated spelling of `exposure_log` (accepted with warning W005).
    pub exposures: Option<String>,
    /// The value the exposure log's experiment column holds for this experiment (default: the
    /// experiment's name).
    pub logged_as: Option<Scalar>,
    /// Deprecated spelling of `logged_as` (accepted with warning W005).
    pub key: Option<Scalar>,
    /// The control arm (one of `split`).
    pub control: Option<String>,
    /// Arm -> planned share, e.g. `{control: 50, treatment: 50}`; arms as the log records them.
    pub split: Option<OrderedMap<f64>>,
    /// Start (UTC), e.g. `2026-03-02`.
    pub start: Option<Scalar>,
    /// End and data cut-off (UTC, exclusive).
    pub end: Option<Scalar>,
    /// Metrics that decide the experiment (one Holm family).
    pub primary: Option<Vec<String>>,
    /// Metrics to learn from (Benjamini-Hochberg family).
    pub secondary: Option<Vec<String>>,
    /// Metrics that must not get worse (unadjusted; need `direction`).
    pub guardrails: Option<Vec<String>>,
    /// Pre-exposure window for CUPED covariates, e.g. `14d`.
    pub covariate_window: Option<Scalar>,
    /// Segments to slice the readout by.
    pub segments: Option<Vec<String>>,
    /// Default smallest relative change worth detecting for its metrics, e.g. `2%`.
    pub mde: Option<Scalar>,
}

/// Keys renamed in a catalog item: (list, old spelling, new spelling). The old spelling is
/// still accepted, with warning W005 naming the new one; both together are an error.
pub const RENAMED: &[(&str, &str, &str)] = &[
    ("experiments", "exposures", "exposure_log"),
    ("experiments", "key", "logged_as"),
];

impl Experiment {
    /// `exposure_log`, or its deprecated spelling.
    pub fn log(&self) -> Option<&String> {
        self.exposure_log.as_ref().or(self.exposures.as_ref())
    }

    /// `logged_as`, or its deprecated spelling.
    pub fn logged(&self) -> Option<&Scalar> {
        self.logged_as.as_ref().or(self.key.as_ref())
    }
}

/// The top-level lists a catalog file may hold, with the keys each item accepts.
pub const KINDS: &[(&str, &[&str])] = &[
    ("units", &["name", "description", "active"]),
    (
        "event_tables",
        &[
            "name",
            "description",
            "unit",
            "table",
            "sql",
            "id",
            "time",
            "where",
            "columns",
        ],
    ),
    (
        "exposure_logs",
        &[
            "name",
            "description",
            "unit",
            "table",
            "sql",
            "id",
            "time",
            "experiment",
            "arm",
        ],
    ),
    (
        "segments",
        &[
            "name",
            "description",
            "unit",
            "table",
            "id",
            "value",
            "time",
            "from_exposure",
        ],
    ),
    (
        "metrics",
        &[
            "name",
            "description",
            "owner",
            "events",
            "per_unit",
            "of",
            "where",
            "window",
            "winsorize",
            "at_least",
            "ratio",
            "direction",
            "mde",
        ],
    ),
    (
        "experiments",
        &[
            "name",
            "description",
            "exposure_log",
            "exposures",
            "logged_as",
            "key",
            "control",
            "split",
            "start",
            "end",
            "primary",
            "secondary",
            "guardrails",
            "covariate_window",
            "segments",
            "mde",
        ],
    ),
];

/// A catalog file: any of the top-level lists, each optional. The JSON Schema `plumb schema`
/// prints is generated from this type and the item types above, the same ones the loader uses.
#[derive(Debug, Clone, Default, Deserialize, Serialize, JsonSchema)]
#[schemars(deny_unknown_fields)]
pub struct CatalogFile {
    /// What experiments randomise and metrics count per: shoppers, accounts, sessions.
    pub units: Option<Vec<Unit>>,
    /// Tables of timestamped events of a unit (orders, page views).
    pub event_tables: Option<Vec<EventTable>>,
    /// Tables recording which unit saw which arm of which experiment, and when.
    pub exposure_logs: Option<Vec<ExposureLog>>,
    /// Ways to slice units: an attribute from a table or a column of the exposure log.
    pub segments: Option<Vec<Segment>>,
    /// Per-unit numbers computed from events, and ratios of them.
    pub metrics: Option<Vec<Metric>>,
    /// Experiments: exposure log, arms and split, dates, metrics by role.
    pub experiments: Option<Vec<Experiment>>,
}

/// `per_unit` values the resolver accepts (the schema lists the same ones).
pub const PER_UNIT: &[&str] = &["count", "sum", "distinct", "any", "min", "max", "at_least"];
/// `direction` values.
pub const DIRECTIONS: &[&str] = &["increase", "decrease"];

/// Keys an item must have, per definition of the schema (beyond what `anyOf` rules add).
const REQUIRED: &[(&str, &[&str])] = &[
    ("Unit", &["name"]),
    ("EventTable", &["name", "unit", "id", "time"]),
    (
        "ExposureLog",
        &["name", "unit", "id", "time", "experiment", "arm"],
    ),
    ("Segment", &["name"]),
    ("Metric", &["name"]),
    ("Experiment", &["name", "control", "split", "start", "end"]),
];

/// Removes `null` from a property's allowed types: a key that is present needs a value.
fn no_null(prop: &mut serde_json::Value) {
    use serde_json::Value;
    let Some(o) = prop.as_object_mut() else { return };
    if let Some(Value::Array(types)) = o.get_mut("type") {
        types.retain(|t| t != "null");
        if types.len() == 1 {
            let only = types[0].clone();
            o.insert("type".into(), only);
        }
    }
    if let Some(Value::Array(any)) = o.get("anyOf").cloned() {
        let kept: Vec<Value> = any
            .into_iter()
            .filter(|s| s.get("type") != Some(&Value::from("null")))
            .collect();
        if kept.len() == 1 {
            o.remove("anyOf");
            if let Some(inner) = kept[0].as_object() {
                for (k, v) in inner {
                    o.entry(k.clone()).or_insert(v.clone());
                }
            }
        } else {
            o.insert("anyOf".into(), Value::Array(kept));
        }
    }
}

/// The JSON Schema of catalog files, for editors and YAML language servers: generated from the
/// loader's own types (descriptions from their doc comments), then tightened with what serde
/// cannot say: required keys, allowed values (`per_unit`, `direction`), no nulls, the
/// alternatives `table`/`sql` and the deprecated spellings of renamed keys.
pub fn catalog_schema() -> serde_json::Value {
    use serde_json::{Value, json};
    let mut schema = schemars::schema_for!(CatalogFile).to_value();
    let Some(root) = schema.as_object_mut() else {
        return schema;
    };
    root.insert("title".into(), "plumb catalog file".into());
    if let Some(Value::Object(props)) = root.get_mut("properties") {
        for p in props.values_mut() {
            no_null(p);
        }
    }
    if let Some(Value::Object(defs)) = root.get_mut("$defs") {
        for (name, def) in defs.iter_mut() {
            let Some(def) = def.as_object_mut() else { continue };
            if let Some(Value::Object(props)) = def.get_mut("properties") {
                for p in props.values_mut() {
                    no_null(p);
                }
                let mut set_enum = |key: &str, values: &[&str]| {
                    if let Some(Value::Object(p)) = props.get_mut(key) {
                        p.insert("enum".into(), json!(values));
                    }
                };
                if name == "Metric" {
                    set_enum("per_unit", PER_UNIT);
                    set_enum("direction", DIRECTIONS);
                }
                if name == "Experiment" {
                    for (list, old, new) in RENAMED {
                        if *list == "experiments"
                            && let Some(Value::Object(p)) = props.get_mut(*old)
                        {
                            p.insert("deprecated".into(), true.into());
                            p.insert(
                                "description".into(),
                                format!("Old name of `{new}` (still read, with a warning).").into(),
                            );
                        }
                    }
                }
            }
            if let Some((_, keys)) = REQUIRED.iter().find(|(n, _)| n == name) {
                def.insert("required".into(), json!(keys));
            }
            match name.as_str() {
                "EventTable" | "ExposureLog" => {
                    def.insert(
                        "anyOf".into(),
                        json!([{"required": ["table"]}, {"required": ["sql"]}]),
                    );
                }
                "Experiment" => {
                    def.insert(
                        "anyOf".into(),
                        json!([{"required": ["exposure_log"]}, {"required": ["exposures"]}]),
                    );
                }
                _ => {}
            }
        }
    }
    schema
}

#[cfg(test)]
mod tests {
    use super::*;
    use serde_json::Value;

    fn properties(schema: &Value) -> Vec<(String, &Value)> {
        let mut out: Vec<(String, &Value)> = schema["properties"]
            .as_object()
            .unwrap()
            .iter()
            .map(|(k, v)| (k.clone(), v))
            .collect();
        for (name, def) in schema["$defs"].as_object().unwrap() {
            for (k, v) in def["properties"].as_object().into_iter().flatten() {
                out.push((format!("{name}.{k}"), v));
            }
        }
        out
    }

    /// Every key an editor can complete says what it is for, and none accepts null.
    #[test]
    fn every_schema_key_has_a_description_and_needs_a_value() {
        let schema = catalog_schema();
        let props = properties(&schema);
        assert!(props.len() > 50, "{}", props.len());
        for (key, p) in props {
            let d = p["description"].as_str().unwrap_or("");
            assert!(d.len() > 10, "{key} has no description");
            let text = p.to_string();
            assert!(!text.contains("\"null\""), "{key} accepts null: {text}");
        }
    }

    /// The schema lists the values the loader accepts, so an editor flags `per_unit: cnt`; the
    /// keys the resolver requires are required; the syntax keys the loader allows are exactly
    /// the schema's properties.
    #[test]
    fn schema_lists_allowed_values_required_keys_and_the_loaders_keys() {
        let schema = catalog_schema();
        let defs = &schema["$defs"];
        assert_eq!(
            defs["Metric"]["properties"]["per_unit"]["enum"],
            serde_json::json!(PER_UNIT)
        );
        assert_eq!(
            defs["Metric"]["properties"]["direction"]["enum"],
            serde_json::json!(DIRECTIONS)
        );
        assert!(!PER_UNIT.contains(&"cnt"));
        assert_eq!(
            defs["Experiment"]["required"],
            serde_json::json!(["name", "control", "split", "start", "end"])
        );
        assert_eq!(defs["Experiment"]["properties"]["exposures"]["deprecated"], true);
        for (list, def) in [
            ("units", "Unit"),
            ("event_tables", "EventTable"),
            ("exposure_logs", "ExposureLog"),
            ("segments", "Segment"),
            ("metrics", "Metric"),
            ("experiments", "Experiment"),
        ] {
            let mut in_schema: Vec<&str> = defs[def]["properties"]
                .as_object()
                .unwrap()
                .keys()
                .map(String::as_str)
                .collect();
            let mut allowed: Vec<&str> = KINDS.iter().find(|(k, _)| *k == list).unwrap().1.to_vec();
            in_schema.sort();
            allowed.sort();
            assert_eq!(in_schema, allowed, "{list}");
        }
    }
}
