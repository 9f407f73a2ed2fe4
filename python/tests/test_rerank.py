"""medley.rerank and medley.measures against the medley CLI (`medley rerank`), the published
worked values, and their error contract."""

import json
import subprocess
import threading
import time

import numpy as np
import pytest

import medley

CONFIG = """
[server]
max_candidates = 10000
max_k = 1000

[slices.default]
algorithm = "dpp"
lambda = 0.3
k = 10

[slices.capped]
algorithm = "dpp"
lambda = 0.3
k = 10
max_per_category = 2

[slices.raw]
algorithm = "dpp"
lambda = 0.3
k = 10
score_transform = "none"
"""


def _random_case(rng, n):
    """One random slate with its call: every algorithm, windows, caps, profiles, fairness,
    duplicates (repeated embedding rows), d < window and k > N."""
    d = int(rng.integers(1, 9))
    emb = rng.normal(size=(n, d)).astype(np.float32)
    if n > 3 and rng.random() < 0.3:
        emb[1] = emb[0]  # a duplicate item
    scores = rng.random(n)
    if rng.random() < 0.2:
        scores = np.round(scores, 1)  # ties
    cats = [f"c{int(x)}" for x in rng.integers(0, 4, size=n)]
    if rng.random() < 0.2:
        cats[0] = None
    algorithm = str(rng.choice(medley.algorithms()))
    call = dict(algorithm=algorithm, lam=float(rng.choice([0.0, 0.2, 0.5, 0.8, 1.0])),
                k=int(rng.integers(1, n + 5)))
    if algorithm in ("dpp", "ssd") and rng.random() < 0.5:
        call["window"] = int(rng.integers(2, 12))
    if algorithm == "calibrated" or rng.random() < 0.2:
        call["profile"] = {"c0": 0.5, "c1": 0.3, "c3": 0.2, "zz": 0.1}
    groups = None
    if rng.random() < 0.2:
        groups = [("indie" if x < 0.3 else "main") for x in rng.random(n)]
        call["groups"] = groups
        call["fairness"] = {"protected": "indie", "share": 0.4, "alpha": 0.1}
    if rng.random() < 0.15:
        call["max_per_category"] = 2
    elif rng.random() < 0.1:
        call["score_transform"] = "none"
    return scores, emb, cats, call


def _as_request(scores, emb, cats, call, groups):
    cands = []
    for i in range(len(scores)):
        c = {"id": str(i), "score": float(scores[i]), "embedding": [float(x) for x in emb[i]]}
        if cats[i] is not None:
            c["category"] = cats[i]
        if groups is not None:
            c["group"] = groups[i]
        cands.append(c)
    req = {"candidates": cands, "algorithm": call["algorithm"], "lambda": call["lam"], "k": call["k"]}
    for key in ("window", "profile", "fairness"):
        if key in call:
            req[key] = call[key]
    if "max_per_category" in call:
        req["slice"] = "capped"
    if call.get("score_transform") == "none":
        req["slice"] = "raw"
    return req


def test_rerank_equals_the_cli_on_random_slates(tmp_path, medley_bin):
    """Hundreds of random slates, every algorithm: the package's picks equal `medley rerank`'s
    (the service's JSON path) index for index."""
    rng = np.random.default_rng(20261204)
    cases = [_random_case(rng, int(rng.integers(1, 40))) for _ in range(400)]
    requests = tmp_path / "requests.jsonl"
    with open(requests, "w") as f:
        for scores, emb, cats, call in cases:
            f.write(json.dumps(_as_request(scores, emb, cats, call, call.get("groups"))) + "\n")
    config = tmp_path / "medley.toml"
    config.write_text(CONFIG)
    out = subprocess.run([medley_bin, "rerank", "--input", str(requests), "--config", str(config)],
                         check=True, capture_output=True, text=True).stdout.splitlines()
    assert len(out) == len(cases)
    seen = set()
    for (scores, emb, cats, call), line in zip(cases, out):
        answer = json.loads(line)
        assert "error" not in answer, (call, answer)
        want = [int(item["id"]) for item in answer["items"]]
        got = medley.rerank(scores, emb, cats, **call)
        assert got.dtype == np.int64
        assert got.tolist() == want, call
        seen.add(call["algorithm"])
    assert seen == set(medley.algorithms())


def test_float64_embeddings_are_rounded_to_float32_like_the_wire():
    rng = np.random.default_rng(7)
    scores, emb = rng.random(50), rng.normal(size=(50, 6))
    a = medley.rerank(scores, emb, algorithm="dpp", lam=0.6, k=12)
    b = medley.rerank(scores, emb.astype(np.float32), algorithm="dpp", lam=0.6, k=12)
    assert a.tolist() == b.tolist()
    # Non-contiguous input is copied once by numpy, not refused.
    c = medley.rerank(scores[::-1].copy()[::-1], np.asfortranarray(emb), algorithm="dpp", lam=0.6, k=12)
    assert c.tolist() == a.tolist()
    # Relevance needs no embeddings; lists are accepted for scores.
    assert medley.rerank([0.1, 0.9, 0.5], algorithm="relevance", k=2).tolist() == [1, 2]


def test_measures_match_worked_values():
    """Steck (RecSys 2018) miscalibration with alpha = 0.01, profile drama 0.7 / comedy 0.3:
    an all-drama slate 1.134, a 0.7/0.3 slate 0.0, a 0.8/0.2 slate 0.0275 (the diversifiers
    issue's worked values, computed from the paper's definition)."""
    profile = {"drama": 0.7, "comedy": 0.3}
    cats = ["drama"] * 8 + ["comedy"] * 3
    m = medley.measures(list(range(10)), cats[:8] + ["drama", "drama"], profile=profile)
    assert m["miscalibration"] == pytest.approx(1.134, abs=5e-4)
    m = medley.measures([0, 1, 2, 3, 4, 5, 6, 8, 9, 10], cats, profile=profile)
    assert m["miscalibration"] == pytest.approx(0.0, abs=1e-12)
    m = medley.measures([0, 1, 2, 3, 4, 5, 6, 7, 8, 9], cats, profile=profile)
    assert m["miscalibration"] == pytest.approx(0.0275, abs=5e-5)
    # Entropy of two equally frequent categories is 1 bit; ILD of orthogonal unit vectors is 1
    # (cosine distance); both by hand.
    m = medley.measures([0, 1], ["a", "b"], np.eye(2, dtype=np.float32))
    assert m == {"category_entropy_bits": 1.0, "distinct_categories": 2,
                 "intra_list_distance": 1.0, "miscalibration": None}


def _error(fn, *args, **kwargs):
    with pytest.raises(medley.RerankError) as info:
        fn(*args, **kwargs)
    assert isinstance(info.value, ValueError)
    return info.value.code, info.value.path


def test_every_error_code_with_its_path():
    s = np.array([0.5, 0.4, 0.3])
    e = np.eye(3, dtype=np.float32)
    bad_emb = e.copy()
    bad_emb[2, 1] = np.nan
    zero = e.copy()
    zero[1] = 0
    cases = [
        ((s, e), dict(lam=1.5), ("lambda_out_of_range", "lam")),
        ((s, e), dict(lam=float("nan")), ("lambda_out_of_range", "lam")),
        ((s, e), dict(k=0), ("k_out_of_range", "k")),
        ((s, e), dict(k=-3), ("k_out_of_range", "k")),
        ((s, e), dict(window=1), ("window_out_of_range", "window")),
        ((s, e), dict(window=-1), ("window_out_of_range", "window")),
        ((s, bad_emb), {}, ("non_finite", "embeddings[2]")),
        ((np.array([0.5, np.inf, 0.3]), e), {}, ("non_finite", "scores[1]")),
        ((s, zero), {}, ("zero_norm_embedding", "embeddings[1]")),
        ((s,), {}, ("missing_embedding", "embeddings")),
        ((s, np.zeros((3, 0), dtype=np.float32)), {}, ("dimension_out_of_range", "embeddings[0]")),
        ((s, e[:2]), {}, ("invalid_field", "embeddings")),
        ((s, e, ["a", "b"]), {}, ("invalid_field", "categories")),
        ((s, e, ["a", "x" * 2000, "c"]), {}, ("too_long", "categories[1]")),
        ((s, e), dict(algorithm="nope"), ("unknown_algorithm", "algorithm")),
        ((s, e), dict(algorithm="calibrated"), ("missing_profile", "profile")),
        ((s, e), dict(profile={"a": -1.0}), ("invalid_profile", "profile.a")),
        ((s, e), dict(profile={"a": 0.0}), ("invalid_profile", "profile")),
        ((s, e), dict(fairness={"protected": "g", "share": 1.5, "alpha": 0.1}), ("invalid_fairness", "fairness.share")),
        ((s, e), dict(fairness={"protected": "g", "share": 0.5, "alpha": 0.0}), ("invalid_fairness", "fairness.alpha")),
        ((s, e), dict(fairness={"share": 0.5, "alpha": 0.1}), ("invalid_field", "fairness.protected")),
        ((s, e), dict(groups=["g"] * 3, fairness={"protected": "g" * 2000, "share": 0.5, "alpha": 0.1}),
         ("too_long", "fairness.protected")),
        ((s, e), dict(score_transform="log"), ("invalid_field", "score_transform")),
        ((s, e), dict(max_per_category=0), ("invalid_field", "max_per_category")),
        ((np.zeros((2, 2)), e), {}, ("invalid_field", "scores")),
        ((np.zeros(1_000_001),), dict(algorithm="relevance"), ("too_many_candidates", "scores")),
    ]
    for args, kwargs, want in cases:
        assert _error(medley.rerank, *args, **kwargs) == want, (kwargs, want)
    assert _error(medley.measures, [0, 5], ["a", "b"]) == ("invalid_field", "indices[1]")
    assert _error(medley.measures, [0]) == ("invalid_field", "categories")
    err = pytest.raises(medley.RerankError, medley.rerank, s, e, lam=2.0).value
    assert "lambda = 2 is outside [0, 1]" in str(err) and err.message == str(err)


def test_the_gil_is_released_while_the_kernel_runs():
    """Two threads re-ranking two large slates take less than 1.6x one slate's time (2 cores;
    with the GIL held they would take 2x). Best of five, to ride out a noisy neighbour. And a
    Python thread keeps stepping while a kernel runs (below)."""
    rng = np.random.default_rng(3)
    n, d, k = 8000, 128, 300
    scores, emb = rng.random(n), rng.normal(size=(n, d)).astype(np.float32)

    def one():
        medley.rerank(scores, emb, algorithm="dpp", lam=0.5, k=k)

    one()
    single, double = [], []
    for _ in range(5):
        t = time.perf_counter()
        one()
        single.append(time.perf_counter() - t)
        threads = [threading.Thread(target=one) for _ in range(2)]
        t = time.perf_counter()
        for th in threads:
            th.start()
        for th in threads:
            th.join()
        double.append(time.perf_counter() - t)
    assert min(double) < 1.6 * min(single), (single, double)

    # A pure-Python thread already stepping when the kernel starts keeps stepping through it:
    # with the GIL held through the call its longest pause would be the whole call (measured
    # at 0.85-0.87 of it with the release removed); released, it is scheduling noise.
    def long_call():
        medley.rerank(scores, emb, algorithm="dpp", lam=0.5, k=1000)

    t = time.perf_counter()
    long_call()
    call = time.perf_counter() - t
    counting, done, pauses = threading.Event(), threading.Event(), []

    def stepper():
        last, worst = time.perf_counter(), 0.0
        counting.set()
        while not done.is_set():
            now = time.perf_counter()
            worst, last = max(worst, now - last), now
        pauses.append(worst)

    def caller():
        counting.wait()
        long_call()
        done.set()

    threads = [threading.Thread(target=stepper), threading.Thread(target=caller)]
    for th in threads:
        th.start()
    for th in threads:
        th.join()
    assert pauses[0] < 0.5 * call, (pauses, call)


def test_the_package_docstring_example_runs():
    import doctest

    result = doctest.testmod(medley)
    assert result.attempted >= 4 and result.failed == 0
