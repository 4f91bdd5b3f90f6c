"""Build hook: generate the gRPC stubs before the package is built.

`pip install clients/python` (from a checkout of the repository) runs this;
it does what generate.sh does, so the generated files never need committing.
The stubs are generated when this file is loaded, because setuptools needs
the plumbline_client._pb package to exist already when it collects metadata.
"""

import os

from setuptools import setup

HERE = os.path.dirname(os.path.abspath(__file__))
PROTO_DIR = os.path.normpath(os.path.join(HERE, "..", "..", "proto", "plumbline", "v1"))
OUT = os.path.join(HERE, "plumbline_client", "_pb")


def generate() -> None:
    proto = os.path.join(PROTO_DIR, "plumbline.proto")
    if not os.path.isfile(proto):
        if os.path.isfile(os.path.join(OUT, "plumbline_pb2.py")):
            return  # building from a tree that already holds generated stubs
        raise RuntimeError(f"{proto} not found: build from a checkout of the repository")
    from grpc_tools import protoc

    os.makedirs(OUT, exist_ok=True)
    cwd = os.getcwd()
    os.chdir(HERE)
    try:
        rc = protoc.main(
            [
                "grpc_tools.protoc",
                f"-Iplumbline_client/_pb={PROTO_DIR}",
                f"-I{os.path.join(os.path.dirname(protoc.__file__), '_proto')}",
                "--python_out=.",
                "--pyi_out=.",
                "--grpc_python_out=.",
                proto,
            ]
        )
    finally:
        os.chdir(cwd)
    if rc != 0:
        raise RuntimeError(f"grpc_tools.protoc failed with status {rc}")
    with open(os.path.join(OUT, "__init__.py"), "w", encoding="utf-8") as f:
        f.write('"""Generated from proto/plumbline/v1/plumbline.proto; do not edit."""\n')


generate()
setup()
