"""Builds the client package, generating the gRPC stubs from the
repository's proto (two folders up) into apportion_client/v1, with their
import made relative so the stubs live inside the package. The stubs are
made before setuptools looks for the package's folders."""

import pathlib
import tempfile

from grpc_tools import protoc
from setuptools import setup

HERE = pathlib.Path(__file__).resolve().parent
PROTO_ROOT = HERE.parent.parent / "proto"
PROTO = PROTO_ROOT / "apportion" / "v1" / "apportion.proto"


def generate_stubs():
    with tempfile.TemporaryDirectory() as out:
        code = protoc.main([
            "grpc_tools.protoc", f"-I{PROTO_ROOT}", f"--python_out={out}", f"--grpc_python_out={out}", str(PROTO),
        ])
        if code != 0:
            raise SystemExit(f"protoc failed on {PROTO} ({code})")
        target = HERE / "apportion_client" / "v1"
        target.mkdir(exist_ok=True)
        (target / "__init__.py").write_text('"""Stubs generated from proto/apportion/v1/apportion.proto."""\n')
        for name in ("apportion_pb2.py", "apportion_pb2_grpc.py"):
            text = (pathlib.Path(out) / "apportion" / "v1" / name).read_text()
            text = text.replace("from apportion.v1 import apportion_pb2", "from . import apportion_pb2")
            (target / name).write_text(text)


if PROTO.exists():
    generate_stubs()
setup()
