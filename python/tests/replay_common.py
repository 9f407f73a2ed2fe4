"""Helpers shared by the replay tests: a JSONL corpus as Arrow batches, the CLI's frontier."""

import csv
import pathlib
import subprocess

import numpy as np
import pyarrow as pa

from medley.spark import REPLAY_SCHEMA, _rows_of_lines


def batches_of(path: pathlib.Path, rows_per_batch: int):
    """The corpus's lines as RecordBatches of the replay schema (the Spark reader's converter)."""
    lines = pathlib.Path(path).read_text().splitlines()
    out = []
    for start in range(0, len(lines), rows_per_batch):
        out.append(pa.RecordBatch.from_pydict(_rows_of_lines(lines[start:start + rows_per_batch]),
                                              schema=REPLAY_SCHEMA))
    return out


def cli_frontier(medley_bin, corpus, out_dir, algorithms, lambdas, k, windows=None, clicks=None):
    """`medley replay` on the corpus: frontier.csv as a list of dicts (floats; None where empty)."""
    cmd = [medley_bin, "replay", "--input", str(corpus), "--algorithms", ",".join(algorithms),
           "--lambdas", ",".join(str(x) for x in lambdas), "--k", str(k), "--out", str(out_dir)]
    if windows:
        cmd += ["--windows", ",".join(str(w) for w in windows)]
    if clicks:
        cmd += ["--clicks", str(clicks)]
    subprocess.run(cmd, check=True, capture_output=True)
    with open(pathlib.Path(out_dir) / "frontier.csv") as f:
        rows = list(csv.DictReader(f))
    return rows


def assert_tables_equal(table, cli_rows, tol):
    """The package's table equals the CLI's frontier.csv cell by cell within `tol`."""
    assert list(table.columns) == list(cli_rows[0].keys())
    assert len(table) == len(cli_rows)
    for (_, got), want in zip(table.iterrows(), cli_rows):
        assert got["algorithm"] == want["algorithm"]
        assert float(got["lambda"]) == float(want["lambda"])
        w = got["window"]
        assert (want["window"] == "") == (w is None or (isinstance(w, float) and np.isnan(w)))
        for name in list(cli_rows[0].keys())[3:]:
            if want[name] == "":
                assert np.isnan(got[name]), name
            else:
                assert abs(float(got[name]) - float(want[name])) <= tol, (name, got[name], want[name])


def assert_frames_close(a, b, tol):
    assert list(a.columns) == list(b.columns) and len(a) == len(b)
    assert a["algorithm"].tolist() == b["algorithm"].tolist()
    for name in a.columns[3:]:
        x, y = a[name].to_numpy(dtype=float), b[name].to_numpy(dtype=float)
        assert np.array_equal(np.isnan(x), np.isnan(y)), name
        m = ~np.isnan(x)
        assert np.all(np.abs(x[m] - y[m]) <= tol), (name, np.max(np.abs(x[m] - y[m])))
