"""medley.Replay against `medley replay` on the same corpus, and the accumulator merge property
(any partitioning, any merge order, through bytes and pickle: the same table)."""

import pickle
import random

import pytest

import medley
from replay_common import assert_frames_close, assert_tables_equal, batches_of, cli_frontier

ALGORITHMS = ["dpp", "mmr", "ssd", "calibrated"]
LAMBDAS = [0.0, 0.5, 1.0]


def test_replay_equals_the_cli(sample_corpus, medley_bin, tmp_path):
    corpus = sample_corpus(600, 30, 8, 11, "--with-profiles", "--with-groups")
    cli = cli_frontier(medley_bin, corpus, tmp_path, ALGORITHMS, LAMBDAS, 10, windows=[4])
    acc = medley.Replay(ALGORITHMS, LAMBDAS, 10, windows=[4])
    for batch in batches_of(corpus, 128):
        acc.update(batch)
    table = acc.table()
    assert_tables_equal(table, cli, 1e-9)
    assert acc.stats["slates"] == table.attrs["stats"]["slates"] > 500
    assert acc.stats["invalid"] == 0
    # The lines' fairness floors were applied: the protected share is reported.
    assert not table["protected_share"].isna().any()


def test_partitions_merge_to_one_pass_in_any_order(sample_corpus):
    corpus = sample_corpus(900, 25, 6, 12, "--with-profiles")
    batches = batches_of(corpus, 50)
    one = medley.Replay(ALGORITHMS, LAMBDAS, 8, windows=[3])
    for b in batches:
        one.update(b)
    want = one.table()
    rng = random.Random(5)
    for trial in range(3):
        order = batches[:]
        rng.shuffle(order)
        parts = [medley.Replay(ALGORITHMS, LAMBDAS, 8, windows=[3]) for _ in range(rng.randint(2, 7))]
        for b in order:
            rng.choice(parts).update(b)
        # Through bytes and pickle, as partitions travel to a driver.
        parts = [medley.Replay.from_bytes(p.to_bytes()) if i % 2 else pickle.loads(pickle.dumps(p))
                 for i, p in enumerate(parts)]
        rng.shuffle(parts)
        merged = parts[0]
        for p in parts[1:]:
            merged.merge(p)
        assert merged.stats == one.stats
        assert_frames_close(merged.table(), want, 1e-12)


def test_replay_errors():
    with pytest.raises(medley.RerankError) as e:
        medley.Replay(["dpp", "nope"], [0.5], 10)
    assert (e.value.code, e.value.path) == ("unknown_algorithm", "algorithms[1]")
    with pytest.raises(medley.RerankError) as e:
        medley.Replay(["dpp"], [0.5, 1.5], 10)
    assert (e.value.code, e.value.path) == ("lambda_out_of_range", "lambdas[1]")
    with pytest.raises(medley.RerankError) as e:
        medley.Replay(["dpp"], [0.5], 10, windows=[1])
    assert e.value.code == "window_out_of_range"
    with pytest.raises(medley.RerankError) as e:
        medley.Replay(["dpp"], [0.5], 10).merge(medley.Replay(["dpp"], [0.4], 10))
    assert e.value.code == "grid_mismatch"
    with pytest.raises(medley.RerankError) as e:
        medley.Replay.from_bytes(b"not a replay")
    assert e.value.code == "invalid_field"
    state = medley.Replay(["dpp"], [0.5], 10).to_bytes()
    with pytest.raises(medley.RerankError):
        medley.Replay.from_bytes(state[:-3])
