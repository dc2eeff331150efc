#!/usr/bin/env bash
# Generates Python stubs from proto/ and runs the grpcio client check against a real sidecar.
# Needs: python3 with grpcio, grpcio-tools, grpcio-health-checking and numpy; a built candor binary.
set -euo pipefail
repo="$(cd "$(dirname "$0")/../.." && pwd)"
binary="${1:-$repo/target/debug/candor}"
stubs="$(mktemp -d)"
trap 'rm -rf "$stubs"' EXIT
python3 -m grpc_tools.protoc -I"$repo/proto" --python_out="$stubs" --grpc_python_out="$stubs" \
  "$repo/proto/candor/v1/calibrator.proto"
python3 "$repo/tests/python/check_client.py" "$binary" "$repo" "$stubs"
