"""medley.spark on a real local[2] Spark session (PySpark, Java 17): the replay over >= 20,000
slates in 8 partitions equals `medley replay` on the same corpus cell by cell within 1e-9, and
clicks joined from a separate table equal the CLI's --clicks join."""

import json
import os
import sys

import pytest

from replay_common import assert_tables_equal, cli_frontier

from pyspark.sql import SparkSession  # noqa: E402  (never skipped: CI installs pyspark)

import medley.spark  # noqa: E402


@pytest.fixture(scope="module")
def spark():
    # The workers run the test's own interpreter, where medley is installed.
    os.environ["PYSPARK_PYTHON"] = sys.executable
    os.environ["PYSPARK_DRIVER_PYTHON"] = sys.executable
    session = (
        SparkSession.builder.master("local[2]")
        .appName("medley-replay-test")
        .config("spark.ui.enabled", "false")
        .config("spark.sql.shuffle.partitions", "8")
        .config("spark.driver.bindAddress", "127.0.0.1")
        .config("spark.driver.host", "127.0.0.1")
        .getOrCreate()
    )
    session.sparkContext.setLogLevel("ERROR")
    yield session
    session.stop()


def test_spark_replay_equals_the_cli(spark, sample_corpus, medley_bin, tmp_path):
    corpus = sample_corpus(20_000, 30, 8, 21)
    algorithms, lambdas = ["dpp", "mmr", "ssd"], [0.0, 0.3, 0.7, 1.0]
    cli = cli_frontier(medley_bin, corpus, tmp_path / "cli", algorithms, lambdas, 10, windows=[5])
    df = medley.spark.read_exposure_log(spark, str(corpus)).repartition(8)
    assert df.rdd.getNumPartitions() == 8
    table = medley.spark.replay(df, algorithms, lambdas, k=10, windows=[5])
    assert table.attrs["stats"]["rows"] == 20_000
    assert table.attrs["stats"]["slates"] > 19_000  # rows without any click are skipped
    assert_tables_equal(table, cli, 1e-9)


def test_clicks_joined_from_a_table_equal_the_cli_join(spark, sample_corpus, medley_bin, tmp_path):
    corpus = sample_corpus(1_500, 20, 4, 22)
    bare, clicks = tmp_path / "bare.jsonl", tmp_path / "clicks.jsonl"
    with open(corpus) as src, open(bare, "w") as b, open(clicks, "w") as c:
        for line in src:
            doc = json.loads(line)
            clicked = doc.pop("clicked", [])
            b.write(json.dumps(doc) + "\n")
            # Clicks arrive in two events per request, as a click stream would.
            for part in (clicked[:1], clicked[1:]):
                if part:
                    c.write(json.dumps({"request_id": doc["request_id"], "clicked": part}) + "\n")
    cli = cli_frontier(medley_bin, bare, tmp_path / "cli", ["dpp"], [0.0, 0.5], 10, clicks=clicks)
    clicks_df = spark.read.json(str(clicks))
    df = medley.spark.read_exposure_log(spark, str(bare), clicks=clicks_df).repartition(3)
    table = medley.spark.replay(df, ["dpp"], [0.0, 0.5], k=10)
    assert_tables_equal(table, cli, 1e-9)
