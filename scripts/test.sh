#!/usr/bin/env bash
# Installs dependencies, builds mdpserve with its tests (warnings are errors), and runs every
# test with CTest: unit and property tests, the schema and LP reference checks, and the
# million-state size checks. Exits non-zero if anything fails.
set -euo pipefail
root="$(cd "$(dirname "$0")/.." && pwd)"
build="${MDP_BUILD_DIR:-$root/build}"
bash "$root/scripts/install-deps.sh"
cmake -S "$root" -B "$build" -DCMAKE_BUILD_TYPE=RelWithDebInfo -DMDP_BUILD_TESTS=ON \
  -DMDP_WERROR=ON >/dev/null
cmake --build "$build" -j"$(nproc)"
cd "$build"
ctest --output-on-failure -j"$(nproc)" --timeout 1200
