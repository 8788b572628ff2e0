#!/usr/bin/env bash
# Generates the Python stubs of the hypsogrid.v1 protos into a folder (default:
# target/python-stubs), for code that prefers importing pre-built stubs over client.py's
# generation at run time. The output is build output: do not commit it.
#
#   examples/python/generate_stubs.sh [OUT_DIR]
#   python3 examples/python/client.py --stubs target/python-stubs --target 127.0.0.1:50951
set -euo pipefail
repo="$(cd "$(dirname "$0")/../.." && pwd)"
out="${1:-$repo/target/python-stubs}"
python="${PYTHON:-python3}"
[ -x "$repo/target/python-venv/bin/python" ] && python="${PYTHON:-$repo/target/python-venv/bin/python}"
mkdir -p "$out"
include="$("$python" -c 'import grpc_tools, os; print(os.path.join(os.path.dirname(grpc_tools.__file__), "_proto"))')"
"$python" -m grpc_tools.protoc -I"$repo/proto" -I"$include" \
  --python_out="$out" --grpc_python_out="$out" \
  hypsogrid/v1/cycle.proto hypsogrid/v1/service.proto hypsogrid/v1/products.proto
echo "stubs written to $out" >&2
