"""medley's re-ranking kernels, diversity measures and replay accumulators, from Python.

The same Rust code the medley service runs: ``rerank`` returns the slate the service would
serve for the same candidates and parameters, ``measures`` describes a slate's diversity, and
``Replay`` accumulates the offline replay grid over Arrow batches of logged slates, mergeable
across partitions (``medley.spark.replay`` runs it on Apache Spark).

>>> import numpy as np, medley
>>> scores = np.array([0.93, 0.91, 0.90, 0.60])
>>> emb = np.array([[1.0, 0.05], [1.0, 0.0], [0.98, 0.1], [0.0, 1.0]], dtype=np.float32)
>>> medley.rerank(scores, emb, algorithm="dpp", lam=0.5, k=2).tolist()
[0, 3]
"""

# `medley` is also the first part of the gRPC contract's proto package (`medley.v1`): code that
# protoc generates from proto/medley/v1/reranker.proto lands in a `medley/v1/` folder elsewhere
# on sys.path. Extending this package's path lets both be imported in one interpreter.
__path__ = __import__("pkgutil").extend_path(__path__, __name__)

from ._native import REPORT_COLUMNS, Replay, RerankError, algorithms, measures, rerank

__all__ = ["rerank", "measures", "algorithms", "Replay", "RerankError", "REPORT_COLUMNS"]
