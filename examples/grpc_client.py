#!/usr/bin/env python3
"""A Python gRPC client of medley (grpcio), and the cross-language check CI runs.

Compiles proto/medley/v1/reranker.proto with grpcio-tools into a temporary directory, then,
against a running `medley serve` (gRPC on --target, default 127.0.0.1:8082):
  1. re-ranks 40 candidates of an invented outdoor-gear shop with dpp and prints the slate;
  2. sends lambda = 2 and prints the INVALID_ARGUMENT status with its google.rpc.ErrorInfo
     (reason = the medley code, metadata path);
  3. streams three requests with a bad one in the middle and prints the three replies.
Exits 1 if any answer is not what the contract says.

    pip install grpcio grpcio-tools grpcio-status
    python3 examples/grpc_client.py --target 127.0.0.1:8082
"""

import argparse
import importlib
import pathlib
import random
import sys
import tempfile

import grpc
from google.rpc import error_details_pb2
from grpc_status import rpc_status
from grpc_tools import protoc

ROOT = pathlib.Path(__file__).resolve().parent.parent


def load_stubs():
    """Generates reranker_pb2 / reranker_pb2_grpc into a temp dir and imports them."""
    out = tempfile.mkdtemp(prefix="medley-grpc-")
    include = str(ROOT / "proto")
    grpc_include = str(pathlib.Path(protoc.__file__).parent / "_proto")
    code = protoc.main(["protoc", f"-I{include}", f"-I{grpc_include}", f"--python_out={out}",
                        f"--grpc_python_out={out}", str(ROOT / "proto/medley/v1/reranker.proto")])
    if code != 0:
        sys.exit("protoc failed")
    sys.path.insert(0, out)
    return (importlib.import_module("medley.v1.reranker_pb2"),
            importlib.import_module("medley.v1.reranker_pb2_grpc"))


def candidates(pb, rng, n=40, dim=8):
    kinds = ["tents", "stoves", "packs", "boots"]
    out = []
    for i in range(n):
        kind = kinds[i % len(kinds)]
        # Items of one kind point the same way, plus noise.
        emb = [(1.0 if j % len(kinds) == i % len(kinds) else 0.0) + rng.gauss(0, 0.3) for j in range(dim)]
        out.append(pb.Candidate(id=f"{kind}-{i:02d}", score=1.0 - i / n + rng.random() * 0.05,
                                category=kind, embedding=emb))
    return out


def error_info(err):
    """The (reason, path) of the ErrorInfo in a failed call's status details."""
    status = rpc_status.from_call(err)
    for detail in status.details if status else []:
        if detail.Is(error_details_pb2.ErrorInfo.DESCRIPTOR):
            info = error_details_pb2.ErrorInfo()
            detail.Unpack(info)
            assert info.domain == "medley", info.domain
            return info.reason, info.metadata.get("path")
    return None, None


def main():
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--target", default="127.0.0.1:8082")
    args = parser.parse_args()
    pb, stubs = load_stubs()
    rng = random.Random(7)
    failures = []

    with grpc.insecure_channel(args.target) as channel:
        grpc.channel_ready_future(channel).result(timeout=10)
        client = stubs.RerankerStub(channel)

        # 1. One slate.
        request = pb.RerankRequest(request_id="trail-1", algorithm="dpp", k=8, candidates=candidates(pb, rng))
        setattr(request, "lambda", 0.5)  # `lambda` is a Python keyword
        response = client.Rerank(request, timeout=5)
        print(f"slate ({response.algorithm}, lambda {getattr(response, 'lambda')}, arm {response.arm}):")
        for item in response.items:
            print(f"  {item.id:10s} {item.category:7s} {item.score:.3f}")
        d = response.diversity
        print(f"  {d.distinct_categories} categories, entropy {d.category_entropy_bits:.3f} bits, "
              f"intra-list distance {d.intra_list_distance:.3f}")
        if len(response.items) != 8 or response.request_id != "trail-1" or d.distinct_categories < 3:
            failures.append("the slate is not 8 diverse items echoing the request id")

        # 2. A refused request: the status, the medley code and the path.
        bad = pb.RerankRequest(candidates=candidates(pb, rng, n=5))
        setattr(bad, "lambda", 2.0)
        try:
            client.Rerank(bad, timeout=5)
            failures.append("lambda = 2 was served")
        except grpc.RpcError as err:
            reason, path = error_info(err)
            print(f"refused: {err.code().name} reason={reason} path={path}: {err.details()}")
            if (err.code(), reason, path) != (grpc.StatusCode.INVALID_ARGUMENT, "lambda_out_of_range", "lambda"):
                failures.append(f"lambda = 2: {err.code()} {reason} {path}")

        # 3. A stream with a bad request in the middle: three replies, in order.
        def messages():
            for i in range(3):
                m = pb.RerankRequest(request_id=f"stream-{i}", k=4, candidates=candidates(pb, rng, n=12))
                if i == 1:
                    m.window = 1  # outside 2..=1000
                yield m

        replies = list(client.RerankStream(messages(), timeout=10))
        for reply in replies:
            kind = reply.WhichOneof("reply")
            if kind == "response":
                print(f"stream reply: {reply.response.request_id} -> {[i.id for i in reply.response.items]}")
            else:
                e = reply.error
                print(f"stream reply: error at {e.index}: {e.code} ({e.path}): {e.message}")
        kinds = [r.WhichOneof("reply") for r in replies]
        if kinds != ["response", "error", "response"] or replies[1].error.code != "window_out_of_range" \
                or replies[1].error.index != 1 or replies[2].response.request_id != "stream-2":
            failures.append(f"stream replies: {kinds}")

    if failures:
        print("FAILED: " + "; ".join(failures), file=sys.stderr)
        sys.exit(1)
    print("ok: grpcio client and medley agree on the contract")


if __name__ == "__main__":
    main()
