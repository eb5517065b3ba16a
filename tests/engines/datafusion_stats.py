"""Runs plumb's readout queries (generic, postgres and trino dialects) on Apache DataFusion
and writes each statistics table as CSV (what `plumb analyze --stats` reads).

Usage: python datafusion_stats.py JOBS.json
JOBS.json: [{"sql": "q.sql", "tables": {"orders": "orders.csv", ...}, "out": "stats.csv"}, ...]
"""
import csv
import json
import sys
import time

import datafusion
from datafusion import SessionConfig, SessionContext


def main(path):
    jobs = json.load(open(path))
    config = SessionConfig().with_target_partitions(2)
    # DataFusion 55.x rejects some GROUPING SETS plans on a schema check of its own (the
    # nullability of grouped columns); the check is skipped, the results are unaffected.
    config = config.set("datafusion.execution.skip_physical_aggregate_schema_check", "true")
    for job in jobs:
        t0 = time.time()
        ctx = SessionContext(config)
        for name, csv_path in job["tables"].items():
            ctx.register_csv(name, csv_path, has_header=True)
        df = ctx.sql(open(job["sql"]).read())
        batches = df.collect()
        names = df.schema().names
        with open(job["out"], "w", newline="") as f:
            w = csv.writer(f)
            w.writerow(names)
            for b in batches:
                columns = [b.column(i).to_pylist() for i in range(b.num_columns)]
                for row in zip(*columns):
                    w.writerow(["" if v is None else (repr(v) if isinstance(v, float) else v) for v in row])
        print(f"{job['sql']}: {time.time() - t0:.2f}s", file=sys.stderr)
    print(f"datafusion {datafusion.__version__}", file=sys.stderr)


if __name__ == "__main__":
    main(sys.argv[1])
