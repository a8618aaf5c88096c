#!/usr/bin/env bash
# fuzz.sh: builds the fuzz targets (tests/fuzz/README.md) with clang, libFuzzer and the
# address and undefined-behaviour sanitizers, and runs each for a while on a working copy of
# its corpus. A measurement of robustness, not part of `.ci/run` (CTest replays the committed
# corpora with the ordinary build). Exits 1 if any target found an input that crashes or
# breaks a property; the inputs are kept under the build directory's artifacts/.
#
#   bash scripts/fuzz.sh [--seconds N] [--jobs J] [--build-dir DIR] [TARGET...]
#
#   --seconds N      how long each target runs (default 300)
#   --jobs J         targets run at once (default: the number of CPUs)
#   --build-dir DIR  default /tmp/mdpserve-fuzz; its corpus/TARGET holds what the fuzzer
#                    learned and is reused by the next run
#   TARGET           model_objects_fuzz, model_arrays_fuzz, api_requests_fuzz,
#                    stored_records_fuzz, http_transport_fuzz, service_api_fuzz,
#                    discounted_oracle_fuzz (default: all)
#
# To keep a new input as a regression test: copy it into tests/fuzz/corpus/TARGET/.
set -euo pipefail
root="$(cd "$(dirname "$0")/.." && pwd)"
seconds=300
jobs="$(nproc)"
build=/tmp/mdpserve-fuzz
targets=()
while [ $# -gt 0 ]; do
  case "$1" in
    --seconds) seconds="$2"; shift 2 ;;
    --jobs) jobs="$2"; shift 2 ;;
    --build-dir) build="$2"; shift 2 ;;
    -*) echo "fuzz.sh: unknown option $1" >&2; exit 2 ;;
    *) targets+=("$1"); shift ;;
  esac
done
if [ ${#targets[@]} -eq 0 ]; then
  targets=(model_objects_fuzz model_arrays_fuzz api_requests_fuzz stored_records_fuzz
           http_transport_fuzz service_api_fuzz discounted_oracle_fuzz)
fi

bash "$root/scripts/install-deps.sh" clang libomp-dev
flags="-fsanitize=address,undefined -fsanitize=fuzzer-no-link -fno-omit-frame-pointer"
flags="$flags -fno-sanitize-recover=undefined"
CC=clang CXX=clang++ cmake -S "$root" -B "$build" -DCMAKE_BUILD_TYPE=RelWithDebInfo \
  -DMDP_FUZZ=ON -DCMAKE_CXX_FLAGS="$flags" \
  -DCMAKE_EXE_LINKER_FLAGS="-fsanitize=address,undefined" >/dev/null
cmake --build "$build" -j"$(nproc)" --target "${targets[@]}"

run_one() {  # $1 = target
  local t="$1"
  mkdir -p "$build/corpus/$t" "$build/artifacts/$t"
  cp -n "$root/tests/fuzz/corpus/$t/"* "$build/corpus/$t/" 2>/dev/null || true
  UBSAN_OPTIONS=print_stacktrace=1 "$build/bin/$t" -max_total_time="$seconds" \
    -max_len=16384 -timeout=30 -rss_limit_mb=3072 -print_final_stats=1 \
    -artifact_prefix="$build/artifacts/$t/" "$build/corpus/$t" >"$build/$t.log" 2>&1 || true
}

pids=()
for t in "${targets[@]}"; do
  while [ "$(jobs -rp | wc -l)" -ge "$jobs" ]; do sleep 1; done
  echo "fuzz.sh: $t for ${seconds}s (log $build/$t.log)"
  run_one "$t" &
  pids+=($!)
done
for p in "${pids[@]}"; do wait "$p"; done

status=0
printf '\n%-22s %12s %10s %8s %s\n' target runs coverage corpus "inputs that broke it"
for t in "${targets[@]}"; do
  runs=$(sed -n 's/^stat::number_of_executed_units: *//p' "$build/$t.log" | tail -n 1)
  cov=$(grep -o 'cov: [0-9]*' "$build/$t.log" | tail -n 1 | cut -d' ' -f2)
  corpus=$(find "$build/corpus/$t" -type f | wc -l)
  found=$(find "$build/artifacts/$t" -type f | wc -l)
  printf '%-22s %12s %10s %8s %s\n' "$t" "${runs:-?}" "${cov:-?}" "$corpus" "$found"
  if [ "$found" -gt 0 ]; then
    status=1
    find "$build/artifacts/$t" -type f | sed 's/^/    /'
  fi
done
exit $status
