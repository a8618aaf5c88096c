#!/usr/bin/env bash
# End-to-end size check: writes a 1,000,000-state x 4-action x 8-outcome model document
# (about 2.4 GB of JSON), then validates and solves it with the mdpserve command line,
# printing wall time and peak memory of each step. Exits non-zero if any step fails or the
# solve does not converge. Usage: large_model_check.sh BUILD_DIR [STATES]
set -euo pipefail
build="${1:?usage: large_model_check.sh BUILD_DIR [STATES]}"
states="${2:-1000000}"
work=$(mktemp -d)
trap 'rm -rf "$work"' EXIT

measure() {  # measure LABEL CMD...: runs CMD, prints wall seconds and peak RSS.
  local label=$1; shift
  /usr/bin/time -f "%e %M" -o "$work/time" "$@"
  read -r secs kib < "$work/time"
  printf 'large_model_check: %-10s %8.1f s  peak %6d MiB\n' "$label" "$secs" $((kib / 1024))
}

measure generate sh -c "'$build/bin/write_large_model' $states 4 8 42 > '$work/model.json'"
printf 'large_model_check: document %d MiB\n' $(( $(stat -c %s "$work/model.json") / 1048576 ))
measure validate sh -c "'$build/bin/mdpserve' validate '$work/model.json' > '$work/errors.json' 2>/dev/null"
measure solve "$build/bin/mdpserve" solve "$work/model.json" --threads 0 --detail summary \
  --out "$work/solution.json"
/usr/bin/python3 - "$work/solution.json" "$states" <<'PY'
import json, sys
doc = json.load(open(sys.argv[1]))
states = int(sys.argv[2])
assert doc["outcome"] == "converged", doc["outcome"]
assert doc["model"]["states"] == states and len(doc["values"]) == states
assert doc["value_error_bound"] <= doc["options"]["tolerance"]
print(f"large_model_check: {doc['method']} converged in {doc['iterations']} iterations, "
      f"solve {doc['solve_seconds']:.1f} s, bound {doc['value_error_bound']:.2e}")
print("1 passed, 0 failed")
PY
