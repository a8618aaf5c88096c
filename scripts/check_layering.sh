#!/usr/bin/env bash
# Fails if the solver core reaches for anything but Eigen and the standard library:
# no HTTP, no JSON, no logging, no file or console I/O under solver/.
set -euo pipefail
root="${1:-$(dirname "$0")/..}"
bad=$(grep -rnE '#include *[<"](httplib\.h|nlohmann/|spdlog/|CLI/|sqlite3\.h|fstream|iostream|cstdio)' \
      "$root/solver" || true)
if [ -n "$bad" ]; then
  echo "layering: solver/ must not include these:"
  echo "$bad"
  exit 1
fi
echo "layering: solver/ includes only Eigen and the standard library"
