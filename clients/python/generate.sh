#!/usr/bin/env bash
# Generates the Python protobuf and gRPC stubs of the plumbline API into
# plumbline_client/_pb/ from ../../proto/plumbline/v1/plumbline.proto.
#
# Run it once after installing requirements.txt, and again whenever the proto
# changes. The generated files are not committed (see .gitignore).
#
# The proto directory is mapped to the virtual import path
# `plumbline_client/_pb`, so the generated gRPC module imports its messages as
# `from plumbline_client._pb import plumbline_pb2` and the package works
# without touching sys.path.
set -euo pipefail
here="$(cd "$(dirname "$0")" && pwd)"
proto_dir="$here/../../proto/plumbline/v1"
out="$here/plumbline_client/_pb"
python="${PYTHON:-python3}"

if [ ! -f "$proto_dir/plumbline.proto" ]; then
    echo "generate.sh: $proto_dir/plumbline.proto not found" >&2
    exit 1
fi

rm -rf "$out"
mkdir -p "$out"
(
    cd "$here"
    "$python" -m grpc_tools.protoc \
        "-Iplumbline_client/_pb=$proto_dir" \
        --python_out=. \
        --pyi_out=. \
        --grpc_python_out=. \
        "$proto_dir/plumbline.proto"
)
printf '"""Generated from proto/plumbline/v1/plumbline.proto by generate.sh; do not edit."""\n' \
    > "$out/__init__.py"
echo "generate.sh: stubs written to ${out#"$here"/}/"
