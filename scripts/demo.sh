#!/usr/bin/env bash
# Installs dependencies, builds mdpserve, and solves the bundled pump-maintenance demo model,
# printing its policy as a table. Run from anywhere; builds into build/ at the project root.
set -euo pipefail
root="$(cd "$(dirname "$0")/.." && pwd)"
bash "$root/scripts/install-deps.sh"
cmake -S "$root" -B "$root/build" -DCMAKE_BUILD_TYPE=Release -DMDP_BUILD_TESTS=OFF >/dev/null
cmake --build "$root/build" -j"$(nproc)" --target mdpserve
echo
"$root/build/bin/mdpserve" solve "$root/api-schema/examples/pump-maintenance.json" --table
