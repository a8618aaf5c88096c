#!/usr/bin/env bash
# bench.sh: the benchmark suite of issue 5. Builds the bench targets, measures the solver and
# its baselines side by side (numpy/scipy on the same models, json.load on the same document,
# nginx for queries, a read-bandwidth probe), the service's memory against the raw bytes of a
# solved model's arrays, and writes BENCHMARKS.md at the repository root.
# A measurement, not a test: it exits 0 when targets are missed, non-zero only when a step
# fails. Every process it starts runs in the foreground (bench_queries.sh stops its servers
# by PID itself).
#
#   scripts/bench.sh [--quick] [--build-dir DIR] [--out FILE]
#
#   --quick        100k-state models, fewer repetitions: about 3 minutes after the build.
#                  Without it: the issue's 1M states x 4 actions x 8 outcomes (about 15-25
#                  minutes on 2 cores; peak memory about 2 GB).
#   --build-dir    build directory (default build-bench; configured with MDP_BUILD_BENCH=ON)
#   --out          report path (default BENCHMARKS.md at the repository root)
#
# Environment (optional): BENCH_STATES, BENCH_STRUCTURES ("random local local_shuffled grid
# inventory"), BENCH_SOLVE_STRUCTURE (local), BENCH_METHODS, BENCH_EXTRA_SOLVE_STRUCTURES
# ("random grid inventory": also solved, with BENCH_EXTRA_METHODS), BENCH_SWEEPS (least number of
# timed sweeps per configuration; more are timed until 0.5 s has passed),
# BENCH_INGEST_STATES (100000), BENCH_MEMORY_STATES (service_memory.py's model; default the
# run's state count), BENCH_BUILD_TYPE (RelWithDebInfo, as the default build),
# BENCH_CRITERIA_STRUCTURES ("random local grid@100000": solved under the average, total and
# finite-horizon criteria too; "@N" sets a structure's state count), BENCH_CRITERIA_STATES (the
# run's state count, for structures without "@"), BENCH_CRITERIA_TIME_LIMIT (120 s
# per solve), BENCH_SKIP_CRITERIA=1,
# BENCH_QUERY_RUNS ("64:1 16:1 64:2": one query run per CONNECTIONS:WRK_THREADS pair, wrk's
# keep-alive connections and its threads; 64 connections saturate the 2 cores, 16 keep fewer
# requests in flight; with 2 wrk threads the load generator competes with the servers for
# both cores, with 1 it takes at most one core's worth), BENCH_QUERY_SLICES ("100 0": the
# --http-slice-us values measured in each query round, the server's default first, which the
# targets judge; 0 is the kernel's default slice),
# BENCH_SOLVE_LOAD_STATES (250000: the model solve_load_bench.py solves while it queries),
# BENCH_KEEP=1 keeps the run directory, BENCH_SKIP_QUERIES=1 (also skips the queries while a
# solve runs), BENCH_SKIP_MEMORY=1.
set -euo pipefail

ROOT=$(cd "$(dirname "${BASH_SOURCE[0]}")/.." && pwd)
PY=/usr/bin/python3
MODE=full
BUILD="$ROOT/build-bench"
OUT="$ROOT/BENCHMARKS.md"
while (( $# > 0 )); do
  case $1 in
    --quick) MODE=quick ;;
    --build-dir) BUILD=$(realpath -m "$2"); shift ;;
    --out) OUT=$(realpath -m "$2"); shift ;;
    -h|--help) sed -n '2,/^set -e/p' "$0" | sed '$d; s/^# \{0,1\}//'; exit 0 ;;
    *) echo "bench.sh: unknown argument $1 (try --help)" >&2; exit 2 ;;
  esac
  shift
done

if [[ $MODE == quick ]]; then
  STATES=${BENCH_STATES:-100000}; SWEEPS=${BENCH_SWEEPS:-20}; INGEST_REPS=2
  QUERY_SECONDS=5; QUERY_ROUNDS=1; KERNEL_MIN_TIME=0.05; TIME_LIMIT=300
  SOLVE_LOAD_ROUNDS=1
else
  STATES=${BENCH_STATES:-1000000}; SWEEPS=${BENCH_SWEEPS:-10}; INGEST_REPS=3
  QUERY_SECONDS=10; QUERY_ROUNDS=3; KERNEL_MIN_TIME=0.2; TIME_LIMIT=1800
  SOLVE_LOAD_ROUNDS=3
fi
STRUCTURES=${BENCH_STRUCTURES:-random local local_shuffled grid inventory}
CRITERIA_STRUCTURES=${BENCH_CRITERIA_STRUCTURES:-random local grid@100000}
CRITERIA_STATES=${BENCH_CRITERIA_STATES:-$STATES}
CRITERIA_TIME_LIMIT=${BENCH_CRITERIA_TIME_LIMIT:-120}
SOLVE_STRUCTURE=${BENCH_SOLVE_STRUCTURE:-local}
DEFAULT_METHODS=value_iteration,value_iteration:1,gauss_seidel,policy_iteration
DEFAULT_METHODS+=,modified_policy_iteration
METHODS=${BENCH_METHODS:-$DEFAULT_METHODS}
# The other structures are solved too, by fewer methods (no numpy baseline), so that the
# methods' ranking is seen beyond the local model.
EXTRA_SOLVE_STRUCTURES=${BENCH_EXTRA_SOLVE_STRUCTURES-random grid inventory}
EXTRA_METHODS=${BENCH_EXTRA_METHODS:-value_iteration,policy_iteration,gauss_seidel}
INGEST_STATES=${BENCH_INGEST_STATES:-100000}
MEMORY_STATES=${BENCH_MEMORY_STATES:-$STATES}
QUERY_RUNS=${BENCH_QUERY_RUNS:-64:1 16:1 64:2}
QUERY_SLICES=${BENCH_QUERY_SLICES:-100 0}
SOLVE_LOAD_STATES=${BENCH_SOLVE_LOAD_STATES:-250000}
for spec in $QUERY_RUNS; do  # Checked now, not after the long steps.
  if ! [[ $spec =~ ^[1-9][0-9]*:[1-9][0-9]*$ ]]; then
    echo "bench.sh: BENCH_QUERY_RUNS lists CONNECTIONS:WRK_THREADS pairs, not '$spec'" >&2
    exit 2
  fi
done
STARTED=$(date +%s)

WORK=$(mktemp -d "${TMPDIR:-/tmp}/mdp-bench.XXXXXX")
cleanup() {
  local rc=$?
  if [[ ${BENCH_KEEP:-0} == 1 || $rc != 0 ]]; then
    echo "bench.sh: run directory kept: $WORK" >&2
  else
    rm -rf "$WORK"
  fi
  exit "$rc"
}
trap cleanup EXIT
trap 'exit 130' INT
trap 'exit 143' TERM

say() { echo "bench.sh: $*" >&2; }
sample_load() { echo "$1 $(cut -d' ' -f1-3 /proc/loadavg)" >>"$WORK/load.txt"; }
# Runs a command after logging it (repository-relative) to commands.txt; an argument with
# a space in it is logged in single quotes, so that the logged line runs as it reads.
run() {
  local line="" arg
  for arg in "$@"; do
    if [[ "$arg" == *[[:space:]]* ]]; then line+="'$arg' "; else line+="$arg "; fi
  done
  echo "${line% }" | sed "s#$WORK#\$RUN#g; s#$ROOT/##g; s#$ROOT#.#g" >>"$WORK/commands.txt"
  "$@"
}

sample_load start
say "building solver_bench, kernel_bench and mdpserve in $BUILD"
run cmake -S "$ROOT" -B "$BUILD" -DMDP_BUILD_BENCH=ON -DMDP_BUILD_TESTS=OFF \
  -DCMAKE_BUILD_TYPE="${BENCH_BUILD_TYPE:-RelWithDebInfo}" >"$WORK/cmake.log"
run cmake --build "$BUILD" -j"$(nproc)" --target solver_bench kernel_bench mdpserve \
  >>"$WORK/cmake.log"
BIN="$BUILD/bin"
sample_load built

for structure in $STRUCTURES; do
  # The probe runs next to each model's sweeps, so both see the same load on a shared machine.
  say "$structure: read-bandwidth probe"
  run "$BIN/solver_bench" probe --bytes=1073741824 --repetitions=5 >"$WORK/probe-$structure.json"
  solves=() solve=() methods=
  if [[ $structure == "$SOLVE_STRUCTURE" ]]; then
    methods=$METHODS
    solve=(--solve --tolerance 1e-6 --time-limit "$TIME_LIMIT")
  elif [[ " $EXTRA_SOLVE_STRUCTURES " == *" $structure "* ]]; then
    methods=$EXTRA_METHODS
  fi
  if [[ -n $methods ]]; then
    solves=(--methods="$methods" --tolerance=1e-6 --time-limit="$TIME_LIMIT")
  fi
  # The local model's bandwidth target is judged on rounds that alternate probe and sweep.
  if [[ $structure == local ]]; then
    solves+=(--paired-probe-bytes=1073741824 --paired-rounds=15)
  fi
  say "$structure: $STATES states${methods:+, solves: $methods}"
  run "$BIN/solver_bench" model --structure="$structure" --states="$STATES" --sweeps="$SWEEPS" \
    "${solves[@]}" --write-arrays="$WORK/arrays-$structure" >"$WORK/model-$structure.json"
  # Last, numpy's sweep and the solver's alternate round by round (the solver in its own
  # process, on the same model generated again): the sweep targets are judged on these rounds.
  say "$structure: numpy/scipy baseline"
  run "$PY" "$ROOT/scripts/bench/baseline_sweep.py" "$WORK/arrays-$structure" \
    --sweeps "$SWEEPS" "${solve[@]}" --paired-rounds 15 \
    --paired-solver "$(printf %q "$BIN/solver_bench") sweep-on-request --structure=$structure --states=$STATES" \
    >"$WORK/numpy-$structure.json"
  rm -rf "$WORK/arrays-$structure"
  sample_load "$structure"
done

# The other criteria on the same generators: average reward (gain), total cost until a goal
# (every 100th state made terminal, the generated rewards + 1.5 read as costs) and a 100-period
# finite horizon.
if [[ ${BENCH_SKIP_CRITERIA:-0} != 1 ]]; then
  for entry in $CRITERIA_STRUCTURES; do
    structure=${entry%%@*}
    states=$CRITERIA_STATES
    [[ $entry == *@* ]] && states=${entry#*@}
    for criterion in average total finite_horizon; do
      case $criterion in
        average) extra=(--methods=auto,policy_iteration,relative_value_iteration) ;;
        total) extra=(--methods=policy_iteration --terminal-every=100 --objective=minimize
                      --reward-shift=1.5) ;;
        finite_horizon) extra=(--methods=backward_induction --horizon=100) ;;
      esac
      say "$structure: $states states, $criterion criterion"
      run "$BIN/solver_bench" model --structure="$structure" --states="$states" \
        --sweeps=0 --measure-renumbering=0 --criterion="$criterion" "${extra[@]}" \
        --tolerance=1e-6 --time-limit="$CRITERIA_TIME_LIMIT" \
        >"$WORK/criteria-$criterion-$structure-$states.json"
    done
    sample_load "criteria-$structure"
  done
fi

say "kernel micro-benchmarks"
run env MDP_KERNEL_BENCH_STATES="$STATES" "$BIN/kernel_bench" --benchmark_format=json \
  --benchmark_min_time="$KERNEL_MIN_TIME" >"$WORK/kernels.json" 2>"$WORK/kernels.err"
sample_load kernels

say "ingest: $INGEST_STATES-state document"
run "$BIN/solver_bench" model --structure=random --states="$INGEST_STATES" --sweeps=0 \
  --write-json="$WORK/ingest-model.json" >"$WORK/document-objects.json"
run "$PY" "$ROOT/scripts/bench/ingest_bench.py" --mdpserve "$BIN/mdpserve" \
  --document "$WORK/ingest-model.json" --encoding objects --repetitions "$INGEST_REPS" \
  >"$WORK/ingest-objects.json"
say "ingest: the same model in the compact (arrays) encoding"
run "$PY" "$ROOT/scripts/model_to_arrays.py" --to arrays "$WORK/ingest-model.json" \
  "$WORK/ingest-model-arrays.json"
rm -f "$WORK/ingest-model.json"
run "$PY" "$ROOT/scripts/bench/ingest_bench.py" --mdpserve "$BIN/mdpserve" \
  --document "$WORK/ingest-model-arrays.json" --encoding compact --repetitions "$INGEST_REPS" \
  >"$WORK/ingest-compact.json"
rm -f "$WORK/ingest-model-arrays.json"
sample_load ingest

if [[ ${BENCH_SKIP_MEMORY:-0} != 1 ]]; then
  say "service memory: $MEMORY_STATES-state model uploaded and solved"
  run "$PY" "$ROOT/scripts/bench/service_memory.py" --mdpserve "$BIN/mdpserve" \
    --states "$MEMORY_STATES" >"$WORK/service-memory.json"
  sample_load memory
fi

if [[ ${BENCH_SKIP_QUERIES:-0} != 1 ]]; then
  for spec in $QUERY_RUNS; do
    [[ $spec =~ ^([1-9][0-9]*):([1-9][0-9]*)$ ]]
    connections=${BASH_REMATCH[1]} wrk_threads=${BASH_REMATCH[2]}
    label="queries-c$connections-t$wrk_threads"
    say "queries against nginx, $connections connections, $wrk_threads wrk thread(s)" \
      "(scripts/bench_queries.sh)"
    run env MDPSERVE="$BIN/mdpserve" BENCH_KEEP=0 BENCH_SECONDS="$QUERY_SECONDS" \
      BENCH_ROUNDS="$QUERY_ROUNDS" BENCH_CONNECTIONS="$connections" \
      BENCH_WRK_THREADS="$wrk_threads" BENCH_HTTP_SLICES="$QUERY_SLICES" \
      bash "$ROOT/scripts/bench_queries.sh" \
      >"$WORK/$label.txt" 2>"$WORK/$label.err"
    sample_load "$label"
  done
  say "queries while a solve runs, the solve at the HTTP threads' priority and below it" \
    "(solve_load_bench.py)"
  run "$PY" "$ROOT/scripts/bench/solve_load_bench.py" --mdpserve "$BIN/mdpserve" \
    --root "$ROOT" --states "$SOLVE_LOAD_STATES" --rounds "$SOLVE_LOAD_ROUNDS" \
    --seconds "$QUERY_SECONDS" >"$WORK/solve-load.json"
  sample_load solve-load
  say "a solve beside busy loops and saturating queries, mdpserve's OpenMP spin count against" \
    "the runtime's default (contended_solve_bench.py)"
  run "$PY" "$ROOT/scripts/bench/contended_solve_bench.py" --mdpserve "$BIN/mdpserve" \
    --rounds "$SOLVE_LOAD_ROUNDS" >"$WORK/contended-solve.json"
  sample_load contended-solve
fi

sample_load end
run "$PY" "$ROOT/scripts/bench/write_report.py" --work "$WORK" --out "$OUT" --mode "$MODE" \
  --started "$STARTED" --finished "$(date +%s)" --solve-structure "$SOLVE_STRUCTURE"
mkdir -p "$BUILD/bench-results"
cp "$WORK"/*.json "$WORK"/*.txt "$BUILD/bench-results/" 2>/dev/null || true
say "wrote $OUT (raw results in $BUILD/bench-results)"
