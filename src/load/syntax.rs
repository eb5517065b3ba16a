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
    pub catalog: Option<String>,
    pub dialect: Option<String>,
    pub local: Option<LocalData>,
    /// Lint severities: rule code or name -> `off`, `warning` or `error`.
    pub lint: Option<OrderedMap<String>>,
}

pub const WORKSPACE_KEYS: &[&str] = &["catalog", "dialect", "local", "lint"];
pub const LOCAL_KEYS: &[&str] = &["database", "tables", "threads", "memory_limit", "temp_directory"];

/// `local:` in `plumb.yaml`: a DuckDB file and/or table name -> CSV/Parquet/JSON path or glob,
/// and how the local engine runs.
#[derive(Debug, Clone, Default, Deserialize, Serialize, JsonSchema)]
#[schemars(deny_unknown_fields)]
pub struct LocalData {
    pub database: Option<String>,
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
    pub name: Option<String>,
    pub description: Option<String>,
    /// What makes a unit active in a report period: `{events: visits}`.
    pub active: Option<Active>,
}

#[derive(Debug, Clone, Deserialize, Serialize, JsonSchema)]
#[schemars(deny_unknown_fields)]
pub struct Active {
    pub events: Option<String>,
}

#[derive(Debug, Clone, Deserialize, Serialize, JsonSchema)]
#[schemars(deny_unknown_fields)]
pub struct EventTable {
    pub name: Option<String>,
    pub description: Option<String>,
    pub unit: Option<String>,
    pub table: Option<String>,
    pub sql: Option<String>,
    pub id: Option<String>,
    pub time: Option<String>,
    #[serde(rename = "where")]
    pub where_: Option<String>,
    /// Optional list of the table's columns; SQL fragments are checked against it.
    pub columns: Option<Vec<String>>,
}

#[derive(Debug, Clone, Deserialize, Serialize, JsonSchema)]
#[schemars(deny_unknown_fields)]
pub struct ExposureLog {
    pub name: Option<String>,
    pub description: Option<String>,
    pub unit: Option<String>,
    pub table: Option<String>,
    pub sql: Option<String>,
    pub id: Option<String>,
    pub time: Option<String>,
    pub experiment: Option<String>,
    pub arm: Option<String>,
}

#[derive(Debug, Clone, Deserialize, Serialize, JsonSchema)]
#[schemars(deny_unknown_fields)]
pub struct Segment {
    pub name: Option<String>,
    pub description: Option<String>,
    pub unit: Option<String>,
    pub table: Option<String>,
    pub id: Option<String>,
    pub value: Option<String>,
    pub time: Option<String>,
    pub from_exposure: Option<String>,
}

#[derive(Debug, Clone, Deserialize, Serialize, JsonSchema)]
#[schemars(deny_unknown_fields)]
pub struct Metric {
    pub name: Option<String>,
    pub description: Option<String>,
    pub owner: Option<String>,
    pub events: Option<String>,
    pub per_unit: Option<String>,
    pub of: Option<String>,
    #[serde(rename = "where")]
    pub where_: Option<String>,
    pub window: Option<Vec<Scalar>>,
    pub winsorize: Option<Scalar>,
    pub at_least: Option<u64>,
    pub ratio: Option<Vec<String>>,
    /// `increase` or `decrease`: which way is good. Used by guardrails.
    pub direction: Option<String>,
    /// Minimum detectable effect worth detecting, relative: `2%`.
    pub mde: Option<Scalar>,
}

#[derive(Debug, Clone, Deserialize, Serialize, JsonSchema)]
#[schemars(deny_unknown_fields)]
pub struct Experiment {
    pub name: Option<String>,
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
    pub control: Option<String>,
    pub split: Option<OrderedMap<f64>>,
    pub start: Option<Scalar>,
    pub end: Option<Scalar>,
    pub primary: Option<Vec<String>>,
    pub secondary: Option<Vec<String>>,
    pub guardrails: Option<Vec<String>>,
    pub covariate_window: Option<Scalar>,
    pub segments: Option<Vec<String>>,
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
    pub units: Option<Vec<Unit>>,
    pub event_tables: Option<Vec<EventTable>>,
    pub exposure_logs: Option<Vec<ExposureLog>>,
    pub segments: Option<Vec<Segment>>,
    pub metrics: Option<Vec<Metric>>,
    pub experiments: Option<Vec<Experiment>>,
}

/// The JSON Schema of catalog files, for editors and YAML language servers.
pub fn catalog_schema() -> serde_json::Value {
    let mut schema = schemars::schema_for!(CatalogFile).to_value();
    if let Some(o) = schema.as_object_mut() {
        o.insert("title".into(), "plumb catalog file".into());
    }
    schema
}
