#!/usr/bin/env bash
# Installs dependencies, builds mdpserve, and runs the planning service on 127.0.0.1:8080 with
# the bundled pump-maintenance demo model uploaded and solved, printing example queries.
# The embedded store lives in ./mdpserve-data. Stop with Ctrl-C.
set -euo pipefail
root="$(cd "$(dirname "$0")/.." && pwd)"
bash "$root/scripts/install-deps.sh"
cmake -S "$root" -B "$root/build" -DCMAKE_BUILD_TYPE=Release -DMDP_BUILD_TESTS=OFF >/dev/null
cmake --build "$root/build" -j"$(nproc)" --target mdpserve
echo
"$root/build/bin/mdpserve" solve "$root/api-schema/examples/pump-maintenance.json" --table
echo
exec "$root/build/bin/mdpserve" serve --listen "${MDPSERVE_LISTEN:-127.0.0.1:8080}" \
  --data-dir "${MDPSERVE_DATA_DIR:-$root/mdpserve-data}" \
  --preload "$root/api-schema/examples/pump-maintenance.json"
