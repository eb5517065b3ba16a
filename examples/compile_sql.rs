//! Using plumb as a library: load a catalog from memory, resolve it, and print the readout SQL
//! of one experiment for a dialect. Run with `cargo run --release --example compile_sql`.

use plumb::load::load_catalog_texts;
use plumb::render::Dialect;
use plumb::source::SourceMap;

const CATALOG: &str = r#"
units:
  - name: shopper
event_tables:
  - name: orders
    unit: shopper
    table: shop.orders
    id: shopper_id
    time: ordered_at
exposure_logs:
  - name: assignments
    unit: shopper
    table: shop.assignments
    id: shopper_id
    time: exposed_at
    experiment: experiment
    arm: arm
metrics:
  - name: orders
    events: orders
    per_unit: count
    where: "status = 'paid'"
experiments:
  - name: free_shipping
    exposure_log: assignments
    control: control
    split: {control: 50, treatment: 50}
    start: 2026-05-04
    end: 2026-05-18
    primary: [orders]
"#;

fn main() {
    let mut sources = SourceMap::new();
    let (raw, diagnostics) = load_catalog_texts(&[("catalog.yaml", CATALOG)], &mut sources);
    let catalog = match plumb::resolve::resolve(&sources, &raw) {
        Ok(c) if diagnostics.is_empty() => c,
        Ok(_) => {
            eprint!("{}", plumb::diagnostics::render_plain(&sources, &diagnostics));
            std::process::exit(1);
        }
        Err(errors) => {
            eprint!("{}", plumb::diagnostics::render_plain(&sources, &errors));
            std::process::exit(1);
        }
    };
    let dialect = Dialect::load("generic", None).expect("built-in dialect");
    let id = catalog.experiment("free_shipping").expect("declared above");
    let (_plan, sql) = plumb::compile_experiment(&catalog, id, &[], &dialect).expect("valid SQL");
    print!("{sql}");
}
