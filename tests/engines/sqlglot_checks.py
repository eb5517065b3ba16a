"""Static checks of the dialects no test engine runs (BigQuery, Snowflake, Redshift, Trino),
with sqlglot (PyPI):

- "transpile": the dialect's readout SQL, translated by sqlglot to DuckDB and run on DuckDB's
  Python package over the CSV tables; the statistics table is written as CSV, which the Rust
  test compares with plumb's own DuckDB run. This catches formula errors in a dialect's
  capabilities (a covariance or a cap computed differently), not the engine's own behaviour.
- "qualify": the Snowflake SQL resolved against the schema as Snowflake stores normally
  created tables (names in upper case); a name quoted in the wrong case fails to resolve.

Usage: python sqlglot_checks.py JOBS.json
JOBS.json: [{"kind": "transpile", "read": "bigquery", "sql": "q.sql", "tables": {...}, "out": "stats.csv"},
            {"kind": "qualify", "sql": "q.sql", "schema": {"orders": ["order_id", ...]}}, ...]
"""
import csv
import json
import sys

import duckdb
import sqlglot
from sqlglot.optimizer.qualify import qualify


def transpile(job):
    sql = open(job["sql"]).read()
    statements = sqlglot.transpile(sql, read=job["read"], write="duckdb")
    assert len(statements) == 1, f"{job['sql']}: {len(statements)} statements"
    con = duckdb.connect()
    for name, path in job["tables"].items():
        con.execute(f"CREATE VIEW {name} AS SELECT * FROM read_csv('{path}', header = true)")
    cursor = con.execute(statements[0])
    names = [d[0] for d in cursor.description]
    rows = cursor.fetchall()
    with open(job["out"], "w", newline="") as f:
        w = csv.writer(f)
        w.writerow(names)
        for r in rows:
            w.writerow(["" if v is None else (repr(v) if isinstance(v, float) else v) for v in r])


def check_qualify(job):
    schema = {
        table.upper(): {column.upper(): "VARCHAR" for column in columns}
        for table, columns in job["schema"].items()
    }
    expression = sqlglot.parse_one(open(job["sql"]).read(), read="snowflake")
    qualify(expression, schema=schema, dialect="snowflake", validate_qualify_columns=True)


def main(path):
    failures = []
    for job in json.load(open(path)):
        try:
            {"transpile": transpile, "qualify": check_qualify}[job["kind"]](job)
            print(f"ok: {job['kind']} {job['sql']}", file=sys.stderr)
        except Exception as e:  # reported together, so one run shows every failure
            failures.append(f"{job['kind']} {job['sql']}: {e}")
    print(f"sqlglot {sqlglot.__version__}, duckdb {duckdb.__version__}", file=sys.stderr)
    if failures:
        print("\n".join(failures), file=sys.stderr)
        sys.exit(1)


if __name__ == "__main__":
    main(sys.argv[1])
