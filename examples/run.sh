#!/usr/bin/env bash
# Starts a real sidecar (the built binary, demo maps, an ephemeral loopback port) and runs the
# Python and Node.js example clients against it; fails if either gets a wrong answer or the
# sidecar does not exit 0 on SIGTERM. The answers to expect come from `candor apply` on the same
# rows and map.
# Usage: examples/run.sh [CANDOR_BINARY]
# Needs: python3 with examples/python/requirements.txt; node >= 18 after
# `npm ci --prefix examples/node`.
set -euo pipefail
repo="$(cd "$(dirname "$0")/.." && pwd)"
binary="${1:-$repo/target/debug/candor}"
work="$(mktemp -d)"
sidecar=""
cleanup() {
  if [[ -n "$sidecar" ]]; then kill "$sidecar" 2>/dev/null || true; fi
  rm -rf "$work"
}
trap cleanup EXIT

"$binary" apply --map "$repo/demo-data/maps/letter-sorter.json" --data "$repo/examples/rows.jsonl" \
  --out "$work/expected.csv" --decisions

"$binary" serve --maps "$repo/demo-data/maps" --listen 127.0.0.1:0 --admin-listen off \
  --log-format json 2>"$work/sidecar.log" &
sidecar=$!

# The sidecar logs {"fields":{"message":"listening","addr":"127.0.0.1:PORT"}} once it accepts calls.
addr=""
for _ in $(seq 1 300); do
  addr="$(sed -n 's/.*"message":"listening","addr":"\([^"]*\)".*/\1/p' "$work/sidecar.log" | head -n 1)"
  [[ -n "$addr" ]] && break
  kill -0 "$sidecar" 2>/dev/null || { cat "$work/sidecar.log" >&2; echo "the sidecar exited" >&2; exit 1; }
  sleep 0.1
done
[[ -n "$addr" ]] || { cat "$work/sidecar.log" >&2; echo "the sidecar never listened" >&2; exit 1; }
echo "sidecar listening on $addr"

status=0
python3 "$repo/examples/python/client.py" "$addr" "$repo/examples/rows.jsonl" "$work/expected.csv" ||
  status=1
node "$repo/examples/node/client.js" "$addr" "$repo/examples/rows.jsonl" "$work/expected.csv" ||
  status=1

kill -TERM "$sidecar"
code=0
wait "$sidecar" || code=$?
sidecar=""
if [[ "$code" -ne 0 ]]; then
  echo "the sidecar exited with $code on SIGTERM" >&2
  status=1
fi
exit "$status"
