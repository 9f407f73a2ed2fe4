"""Replay on Apache Spark: ``medley.Replay`` per partition through ``DataFrame.mapInArrow``,
the partial accumulators merged on the driver.

Each partition's accumulator holds per grid cell a few sums, 3 x 1000 bootstrap replicate sums
and one exposure count per distinct item it met, so what travels to the driver grows with the
grid and the item catalogue, not with the number of slates. The bootstrap weights of a slate
depend on its ``request_id`` alone, so the merged table equals one pass over all rows whatever
the partitioning (rows without a request id are keyed by their position and are not).
"""

from __future__ import annotations

import base64
import json
from typing import Iterable, Iterator, Optional, Sequence

import pyarrow as pa

from ._native import Replay

#: The replay schema ``read_exposure_log`` produces and ``Replay.update`` reads (embeddings
#: as float32 little-endian bytes, one binary per candidate).
REPLAY_SCHEMA = pa.schema(
    [
        ("request_id", pa.string()),
        ("ids", pa.list_(pa.string())),
        ("scores", pa.list_(pa.float64())),
        ("embeddings", pa.list_(pa.binary())),
        ("categories", pa.list_(pa.string())),
        ("clicked", pa.list_(pa.string())),
        ("served", pa.list_(pa.string())),
        ("profile", pa.map_(pa.string(), pa.float64())),
        ("groups", pa.list_(pa.string())),
        ("fairness", pa.struct([("protected", pa.string()), ("share", pa.float64()), ("alpha", pa.float64())])),
    ]
)

_STATE_SCHEMA = "state binary"


def replay(
    df,
    algorithms: Sequence[str],
    lambdas: Sequence[float],
    k: int = 10,
    windows: Optional[Sequence[int]] = None,
    seed: int = 0,
):
    """The replay table (a pandas DataFrame with ``medley replay``'s frontier.csv columns) of
    a Spark DataFrame whose rows follow the replay schema.

    One ``Replay`` per partition, fed its Arrow batches; each partition returns its state as
    one binary row; the states are merged in a tree on the executors (``treeReduce``, depth 2;
    any order gives the same table to rounding) and the driver reads the table off the one
    merged accumulator it receives. What reading counted
    (rows, slates, rows without clicks, invalid rows) is in the table's ``attrs["stats"]``.
    """
    algorithms = list(algorithms)
    lambdas = [float(x) for x in lambdas]
    windows = None if windows is None else [int(w) for w in windows]
    # Fail on the driver, before any task runs, when the grid is invalid.
    Replay(algorithms, lambdas, k, windows, seed)

    def per_partition(batches: Iterable[pa.RecordBatch]) -> Iterator[pa.RecordBatch]:
        acc = Replay(algorithms, lambdas, k, windows, seed)
        for batch in batches:
            acc.update(batch)
        yield pa.RecordBatch.from_pydict({"state": [acc.to_bytes()]}, schema=pa.schema([("state", pa.binary())]))

    def combine(a: bytes, b: bytes) -> bytes:
        left = Replay.from_bytes(a)
        left.merge(Replay.from_bytes(b))
        return left.to_bytes()

    states = df.mapInArrow(per_partition, _STATE_SCHEMA).rdd.map(lambda row: bytes(row[0]))
    if states.getNumPartitions() == 0:
        return Replay(algorithms, lambdas, k, windows, seed).table()
    # Merged in a tree on the executors: the driver receives one state, not one per partition.
    merged = Replay.from_bytes(states.treeReduce(combine, depth=2))
    return merged.table()


def _f32le(values) -> bytes:
    import numpy as np

    return np.asarray(values, dtype=np.float32).astype("<f4", copy=False).tobytes()


def _rows_of_lines(lines: Iterable[str]) -> dict:
    cols = {name: [] for name in REPLAY_SCHEMA.names}
    for line in lines:
        if not line or not line.strip():
            continue
        try:
            doc = json.loads(line)
        except ValueError:
            continue  # a partial last line of a log cut by a crash; medley replay reports it
        if not isinstance(doc, dict):
            continue
        served = doc.get("served") if isinstance(doc.get("served"), dict) else None
        request = doc.get("request") if served is not None and isinstance(doc.get("request"), dict) else doc
        candidates = request.get("candidates") or []
        request_id = request.get("request_id") or (served or {}).get("request_id")
        embeddings = []
        for c in candidates:
            if c.get("embedding_b64") is not None:
                embeddings.append(base64.b64decode(c["embedding_b64"]))
            elif c.get("embedding") is not None:
                embeddings.append(_f32le(c["embedding"]))
            else:
                embeddings.append(None)
        profile = request.get("profile")
        cols["request_id"].append(request_id)
        cols["ids"].append([c.get("id") for c in candidates])
        cols["scores"].append([c.get("score") for c in candidates])
        cols["embeddings"].append(embeddings)
        cols["categories"].append([c.get("category") for c in candidates])
        cols["clicked"].append(doc.get("clicked") or [])
        cols["served"].append(served.get("items") if served is not None else None)
        cols["profile"].append(list(profile.items()) if isinstance(profile, dict) else None)
        fairness = request.get("fairness")
        cols["groups"].append([c.get("group") for c in candidates] if fairness else None)
        cols["fairness"].append(fairness if isinstance(fairness, dict) else None)
    return cols


def read_exposure_log(spark, path: str, clicks=None):
    """A Spark DataFrame in the replay schema from the JSONL files ``medley serve`` writes as
    its exposure log (``[exposure_log]``), or from corpus lines (a request with ``clicked``),
    under ``path`` (a file, directory or glob Spark's text reader takes).

    ``clicks``: an optional Spark DataFrame of ``request_id`` and ``clicked`` (array of ids),
    joined by request id and added to any clicks a line carries inline. Plain ``.jsonl`` only:
    Spark's bundled Hadoop codecs do not read ``.jsonl.zst`` without native libraries.

    Embeddings sent as JSON numbers are parsed by Python to float64 and rounded to float32, which
    differs from the service's direct float32 parse only for decimals that fall exactly between
    two float32 values after the float64 rounding (vanishingly rare); ``embedding_b64`` is exact.
    """
    from pyspark.sql import functions as F

    def convert(batches: Iterable[pa.RecordBatch]) -> Iterator[pa.RecordBatch]:
        for batch in batches:
            cols = _rows_of_lines(batch.column(0).to_pylist())
            yield pa.RecordBatch.from_pydict(cols, schema=REPLAY_SCHEMA)

    ddl = (
        "request_id string, ids array<string>, scores array<double>, embeddings array<binary>, "
        "categories array<string>, clicked array<string>, served array<string>, "
        "profile map<string, double>, groups array<string>, "
        "fairness struct<protected: string, share: double, alpha: double>"
    )
    df = spark.read.text(path).mapInArrow(convert, ddl)
    if clicks is None:
        return df
    joined = clicks.groupBy("request_id").agg(F.flatten(F.collect_list("clicked")).alias("_joined"))
    return (
        df.join(joined, on="request_id", how="left")
        .withColumn("clicked", F.concat(F.col("clicked"), F.coalesce(F.col("_joined"), F.array().cast("array<string>"))))
        .drop("_joined")
        .select(*REPLAY_SCHEMA.names)
    )
