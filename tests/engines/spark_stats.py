"""Runs plumb's spark-dialect readout queries on Spark SQL in local mode and writes each
statistics table as CSV (the warehouse hand-off that `plumb analyze --stats` reads).

Usage: python spark_stats.py JOBS.json
JOBS.json: [{"sql": "q.sql", "tables": {"orders": "orders.csv", ...}, "out": "stats.csv"}, ...]
One Spark session serves every job: start-up is the expensive part.
"""
import csv
import json
import os
import sys
import time

os.environ.setdefault("SPARK_LOCAL_IP", "127.0.0.1")

from pyspark.sql import SparkSession


def main(path):
    jobs = json.load(open(path))
    started = time.time()
    spark = (
        SparkSession.builder.master("local[2]")
        .appName("plumb-engine-tests")
        .config("spark.sql.session.timeZone", "UTC")
        .config("spark.ui.enabled", "false")
        .config("spark.sql.shuffle.partitions", "2")
        .config("spark.driver.extraJavaOptions", "-XX:TieredStopAtLevel=1")
        .getOrCreate()
    )
    spark.sparkContext.setLogLevel("ERROR")
    print(f"spark session ready in {time.time() - started:.1f}s", file=sys.stderr)
    for job in jobs:
        t0 = time.time()
        for name, csv_path in job["tables"].items():
            (
                spark.read.option("header", True)
                .option("inferSchema", True)
                .option("timestampFormat", "yyyy-MM-dd HH:mm:ss")
                .csv(csv_path)
                .createOrReplaceTempView(name)
            )
        df = spark.sql(open(job["sql"]).read())
        rows = df.collect()
        with open(job["out"], "w", newline="") as f:
            w = csv.writer(f)
            w.writerow(df.columns)
            for r in rows:
                w.writerow(["" if v is None else (repr(v) if isinstance(v, float) else v) for v in r])
        print(f"{job['sql']}: {len(rows)} rows in {time.time() - t0:.1f}s", file=sys.stderr)
    spark.stop()


if __name__ == "__main__":
    main(sys.argv[1])
