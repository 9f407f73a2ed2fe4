"""Regression: with the package installed, the gRPC client example could not import the stubs
protoc generates for the proto package `medley.v1` (a regular package `medley` hid the generated
`medley/v1/` folder; CI's grpcio interop check failed with "No module named 'medley.v1'")."""

import pathlib
import subprocess
import sys

from grpc_tools import protoc


ROOT = pathlib.Path(__file__).resolve().parents[2]


def test_generated_grpc_stubs_import_beside_the_package(tmp_path):
    proto = ROOT / "proto"
    include = pathlib.Path(protoc.__file__).parent / "_proto"
    rc = protoc.main(["protoc", f"-I{proto}", f"-I{include}", f"--python_out={tmp_path}",
                      f"--grpc_python_out={tmp_path}", str(proto / "medley/v1/reranker.proto")])
    assert rc == 0
    # A fresh interpreter, as examples/grpc_client.py runs: the stubs' folder first on sys.path,
    # then the stubs and the package imported side by side.
    script = (
        "import importlib, sys\n"
        f"sys.path.insert(0, {str(tmp_path)!r})\n"
        "pb = importlib.import_module('medley.v1.reranker_pb2')\n"
        "grpc_mod = importlib.import_module('medley.v1.reranker_pb2_grpc')\n"
        "import medley\n"
        "assert pb.RerankRequest(k=3).k == 3 and hasattr(grpc_mod, 'RerankerStub')\n"
        "assert medley.rerank([0.2, 0.9], algorithm='relevance', k=1).tolist() == [1]\n"
    )
    done = subprocess.run([sys.executable, "-c", script], capture_output=True, text=True, cwd=tmp_path)
    assert done.returncode == 0, done.stderr
