"""Shared fixtures: the medley CLI binary the package is checked against."""

import os
import pathlib
import subprocess

import pytest

ROOT = pathlib.Path(__file__).resolve().parents[2]


@pytest.fixture(scope="session")
def medley_bin() -> str:
    """The `medley` binary: $MEDLEY_BIN, else the workspace's debug or release build (built with
    `cargo build` when neither exists). Never skipped: the package is checked against the CLI."""
    env = os.environ.get("MEDLEY_BIN")
    if env:
        return env
    for profile in ("debug", "release"):
        path = ROOT / "target" / profile / "medley"
        if path.exists():
            return str(path)
    subprocess.run(["cargo", "build", "--bin", "medley"], cwd=ROOT, check=True)
    return str(ROOT / "target" / "debug" / "medley")


@pytest.fixture(scope="session")
def sample_corpus(tmp_path_factory, medley_bin):
    """A deterministic demo corpus with clicks and profiles (medley sample), 600 slates."""
    def make(requests: int, candidates: int, dim: int, seed: int, *extra: str) -> pathlib.Path:
        path = tmp_path_factory.mktemp("corpus") / f"corpus-{requests}-{seed}.jsonl"
        with open(path, "wb") as out:
            subprocess.run(
                [medley_bin, "sample", "--requests", str(requests), "--candidates", str(candidates),
                 "--dim", str(dim), "--seed", str(seed), "--with-clicks", "--b64", *extra],
                stdout=out, check=True,
            )
        return path

    return make
