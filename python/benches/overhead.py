"""Per-call cost of medley.rerank at (N, d, k) = (500, 64, 50), to set beside the Rust kernel's
criterion figure (`cargo bench -p medley-core --bench kernels -- N500_d64_k50/dpp`).

Run: python python/benches/overhead.py  (after `pip install ./python`). Prints medians over
25 repeats of 200 calls, with the same slate shape and lambda (0.5) as the criterion bench.
"""

import statistics
import timeit

import numpy as np

import medley

N, D, K = 500, 64, 50
rng = np.random.default_rng(500)
scores = rng.random(N)
emb = rng.normal(size=(N, D)).astype(np.float32)
cats = [f"g{i % 8}" for i in range(N)]


def median_us(fn, number=200, repeat=25):
    return statistics.median(timeit.repeat(fn, number=number, repeat=repeat)) / number * 1e6


cases = {
    "dpp, lam 0.5": lambda: medley.rerank(scores, emb, cats, algorithm="dpp", lam=0.5, k=K),
    "relevance (validation and copy only)": lambda: medley.rerank(scores, emb, cats, algorithm="relevance", k=K),
    "relevance, scores only": lambda: medley.rerank(scores, algorithm="relevance", k=K),
}
for name, fn in cases.items():
    fn()
    print(f"{name:40s} {median_us(fn):8.1f} us")
