"""Writes the seed corpus of the `grpc` fuzz target (fuzz/corpus/grpc/): a few encoded
`medley.v1.RerankRequest` messages, each file named by the SHA-1 of its bytes.

    python3 -m grpc_tools.protoc -Iproto --python_out=/tmp/pb proto/medley/v1/reranker.proto
    PYTHONPATH=/tmp/pb python3 fuzz/make_grpc_seeds.py

(grpcio-tools provides protoc and the protobuf runtime; run from the repository root.)
"""

import hashlib
import os
import struct

from medley.v1 import reranker_pb2 as pb

OUT = "fuzz/corpus/grpc"


def cand(i, d, cat=True, group=None, emb=True):
    c = pb.Candidate(id=f"tent-{i:02d}", score=1.0 - i / 10)
    if cat:
        c.category = f"cat-{i % 3}"
    if group:
        c.group = group
    if emb:
        c.embedding.extend([((i * 7 + j * 3) % 11 - 5) / 5 for j in range(d)])
    return c


def seeds():
    r = pb.RerankRequest(request_id="seed-1", algorithm="dpp", k=3, window=2, **{"lambda": 0.5})
    r.candidates.extend(cand(i, 4, group="independent" if i % 2 else "mainline") for i in range(6))
    r.fairness.protected = "independent"
    r.fairness.share = 0.3
    r.fairness.alpha = 0.1
    yield r.SerializeToString()
    r = pb.RerankRequest(algorithm="relevance", k=2)
    r.candidates.extend(cand(i, 0, emb=False) for i in range(4))
    yield r.SerializeToString()
    r = pb.RerankRequest(algorithm="calibrated", k=3, **{"lambda": 0.7})
    r.candidates.extend(cand(i, 3) for i in range(5))
    r.profile["cat-0"] = 0.7
    r.profile["cat-1"] = 0.3
    yield r.SerializeToString()
    r = pb.RerankRequest(algorithm="mmr", k=2, slice="default", unit_id="u-9")
    r.candidates.extend([cand(1, 2), cand(1, 2)])
    yield r.SerializeToString()
    yield b""
    # One candidate with its embedding unpacked (key 0x25: field 4, 32-bit values), which a
    # proto3 parser must accept, inside a request (key 0x3a: field 7, length-delimited).
    c = cand(3, 0, emb=False).SerializeToString()
    c += b"".join(b"\x25" + struct.pack("<f", v) for v in (0.5, -0.25, 1.0))
    yield pb.RerankRequest(algorithm="ssd", k=1).SerializeToString() + b"\x3a" + bytes([len(c)]) + c


if __name__ == "__main__":
    os.makedirs(OUT, exist_ok=True)
    for m in seeds():
        with open(os.path.join(OUT, hashlib.sha1(m).hexdigest()), "wb") as f:
            f.write(m)
