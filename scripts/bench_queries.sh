#!/usr/bin/env bash
# bench_queries.sh: how fast mdpserve answers best-action queries, compared with nginx
# serving the same answer as a static file. This is a measurement, not a test: it prints a
# table and the ratio mdpserve/nginx, and exits 0 even when a target is missed. It exits
# non-zero only when a tool is missing or a server does not start.
#
# Both servers listen on 127.0.0.1 only; every process this script starts is stopped by its
# PID when the script exits (normally, on error or on Ctrl-C).
#
#   bash scripts/bench_queries.sh
#
# Environment (all optional):
#   BENCH_SECONDS=10          duration of each wrk run
#   BENCH_CONNECTIONS=64      keep-alive connections wrk holds open
#   BENCH_WRK_THREADS=1       wrk threads (on this 2-core machine, 2 wrk threads and the
#                             server's threads compete for both cores: see BENCHMARKS.md)
#   BENCH_HTTP_THREADS="0"    mdpserve --http-threads values to try, space separated (0: the
#                             server's automatic count)
#   BENCH_HTTP_SLICES="100"   mdpserve --http-slice-us values to compare, space separated (0:
#                             the kernel's default slice; 100 is the server's default). One
#                             server per value runs at a time for each --http-threads value,
#                             and each round measures nginx and then each of them in turn
#   BENCH_ROUNDS=1            rounds per --http-threads value (nginx, then each slice's server)
#   BENCH_WARMUP_SECONDS=2    an unrecorded wrk run against each server before the rounds
#                             (0: none), so that round 1 does not also measure the servers'
#                             first moments under load
#   BENCH_NGINX_WORKERS=2     nginx worker processes
#   MDPSERVE=build/bin/mdpserve
#   BENCH_MODEL=api-schema/examples/pump-maintenance.json
#   BENCH_KEEP=1              keep the temporary directory (configs, logs, wrk output)
#   BENCH_SERVER_CPUS=""      CPU list (taskset -c) for both servers; empty: not pinned
#   BENCH_WRK_CPUS=""         CPU list (taskset -c) for wrk; empty: not pinned. With both set
#                             to disjoint lists (e.g. 0 and 1), the load generator no longer
#                             takes CPU time from the server it measures; nginx and mdpserve
#                             still get the very same CPUs.
#
# Targets, per mdpserve run against the nginx run next to it: ratio of requests/s >= 0.6,
# mdpserve p99 latency < 2 ms, and zero errors: non-2xx responses, wrk socket errors, and
# stalled connections (open but never answered: wrk's numbers cannot show those).
# Both servers share the machine's CPUs with wrk and with anything else running, so run it
# on a quiet machine and use BENCH_ROUNDS=3 or more; the table prints loadavg before/after.
set -euo pipefail

ROOT=$(cd "$(dirname "${BASH_SOURCE[0]}")/.." && pwd)
SECONDS_PER_RUN=${BENCH_SECONDS:-10}
CONNECTIONS=${BENCH_CONNECTIONS:-64}
WRK_THREADS=${BENCH_WRK_THREADS:-1}
HTTP_THREADS_LIST=${BENCH_HTTP_THREADS:-0}
HTTP_SLICES_LIST=${BENCH_HTTP_SLICES:-100}
ROUNDS=${BENCH_ROUNDS:-1}
WARMUP_SECONDS=${BENCH_WARMUP_SECONDS:-2}
NGINX_WORKERS=${BENCH_NGINX_WORKERS:-2}
MDPSERVE=${MDPSERVE:-$ROOT/build/bin/mdpserve}
MODEL=${BENCH_MODEL:-$ROOT/api-schema/examples/pump-maintenance.json}
SERVER_CPUS=${BENCH_SERVER_CPUS:-}
WRK_CPUS=${BENCH_WRK_CPUS:-}

TARGET_RATIO=0.6
TARGET_P99_US=2000

die() { echo "bench_queries: $*" >&2; exit 2; }

for n in SECONDS_PER_RUN CONNECTIONS WRK_THREADS ROUNDS NGINX_WORKERS; do
  [[ ${!n} =~ ^[1-9][0-9]*$ ]] || die "$n must be a positive integer, not '${!n}'"
done
[[ $WARMUP_SECONDS =~ ^[0-9]+$ ]] ||
  die "BENCH_WARMUP_SECONDS must be an integer >= 0, not '$WARMUP_SECONDS'"
for t in $HTTP_THREADS_LIST; do
  [[ $t =~ ^[0-9]+$ ]] || die "BENCH_HTTP_THREADS must list integers >= 0, not '$t'"
done
for t in $HTTP_SLICES_LIST; do
  [[ $t =~ ^[0-9]+$ ]] || die "BENCH_HTTP_SLICES must list integers >= 0, not '$t'"
done
[[ -n ${HTTP_SLICES_LIST// /} ]] || die "BENCH_HTTP_SLICES must list at least one value"
(( CONNECTIONS >= WRK_THREADS )) || die "BENCH_CONNECTIONS must be at least BENCH_WRK_THREADS"
for n in SERVER_CPUS WRK_CPUS; do
  [[ -z ${!n} || ${!n} =~ ^[0-9]+([-,][0-9]+)*$ ]] ||
    die "BENCH_$n must be a CPU list like 0 or 0-1 or 0,2, not '${!n}'"
done

# --- Tools -------------------------------------------------------------------------------
NGINX_BIN=$(command -v nginx || true)
[[ -z $NGINX_BIN && -x /usr/sbin/nginx ]] && NGINX_BIN=/usr/sbin/nginx
missing=()
command -v wrk >/dev/null || missing+=(wrk)
[[ -n $NGINX_BIN ]] || missing+=(nginx)
[[ -z $SERVER_CPUS$WRK_CPUS ]] || command -v taskset >/dev/null || missing+=(taskset)
for tool in curl python3 timeout cmp; do command -v "$tool" >/dev/null || missing+=("$tool"); done
if (( ${#missing[@]} > 0 )); then
  die "missing tools: ${missing[*]} (run: bash scripts/install-deps.sh)"
fi
[[ -x $MDPSERVE ]] || die "no mdpserve binary at $MDPSERVE (cd build && cmake .. && make mdpserve)"
[[ -r $MODEL ]] || die "cannot read the model $MODEL"

# --- Cleanup: every started process is stopped by its PID --------------------------------
WORK=$(mktemp -d "${TMPDIR:-/tmp}/bench_queries.XXXXXX")
PIDS=()

stop_pid() {  # Stops one process we started: TERM, up to 5 s, then KILL.
  local pid=$1
  kill -0 "$pid" 2>/dev/null || { wait "$pid" 2>/dev/null || true; return 0; }
  kill -TERM "$pid" 2>/dev/null || true
  for _ in $(seq 50); do
    kill -0 "$pid" 2>/dev/null || break
    sleep 0.1
  done
  kill -0 "$pid" 2>/dev/null && kill -KILL "$pid" 2>/dev/null
  wait "$pid" 2>/dev/null || true
}

forget_pid() {
  local keep=() p
  for p in "${PIDS[@]}"; do [[ $p == "$1" ]] || keep+=("$p"); done
  PIDS=("${keep[@]}")
}

# shellcheck disable=SC2317  # Reached through the traps below.
cleanup() {
  local rc=$? p
  trap - EXIT INT TERM
  for p in "${PIDS[@]}"; do stop_pid "$p"; done
  if [[ ${BENCH_KEEP:-0} == 1 ]]; then
    echo "bench_queries: kept $WORK" >&2
  else
    rm -rf "$WORK"
  fi
  exit "$rc"
}
trap cleanup EXIT
trap 'exit 130' INT
trap 'exit 143' TERM

# Runs "$@" on the CPUs of list $1 (taskset -c), or as is when $1 is empty.
on_cpus() {
  local cpus=$1
  shift
  if [[ -n $cpus ]]; then exec taskset -c "$cpus" "$@"; else exec "$@"; fi
}

free_port() {
  python3 -c 'import socket; s=socket.socket(); s.bind(("127.0.0.1", 0)); print(s.getsockname()[1]); s.close()'
}

# Waits until `curl URL` answers 200 while process PID lives; 10 s at most.
wait_http_ok() {
  local pid=$1 url=$2
  for _ in $(seq 100); do
    kill -0 "$pid" 2>/dev/null || return 1
    [[ $(curl -s -o /dev/null -w '%{http_code}' --max-time 1 "$url" || true) == 200 ]] && return 0
    sleep 0.1
  done
  return 1
}

# --- mdpserve ----------------------------------------------------------------------------
MDP_PID="" MDP_PORT="" MODEL_ID=""
start_mdpserve() {  # $1 = --http-threads, $2 = --http-slice-us
  local threads=$1 slice=$2 dir="$WORK/mdpserve-$1-$2"
  mkdir -p "$dir"
  (on_cpus "$SERVER_CPUS" "$MDPSERVE" serve --listen 127.0.0.1:0 --port-file "$dir/port" \
    --memory-store --preload "$MODEL" --log-level warn --http-threads "$threads" \
    --http-slice-us "$slice") >"$dir/stdout" 2>"$dir/stderr" &
  MDP_PID=$!
  PIDS+=("$MDP_PID")
  for _ in $(seq 300); do  # 30 s for the preload solve to finish.
    kill -0 "$MDP_PID" 2>/dev/null || break
    [[ -s $dir/port ]] && grep -q ' as model ' "$dir/stdout" && break
    sleep 0.1
  done
  MDP_PORT=$(cat "$dir/port" 2>/dev/null || true)
  MODEL_ID=$(sed -n 's/.* as model \([0-9a-zA-Z_-]*\).*/\1/p' "$dir/stdout" | head -1)
  if [[ -z $MDP_PORT || -z $MODEL_ID ]] ||
     ! wait_http_ok "$MDP_PID" "http://127.0.0.1:$MDP_PORT/readyz"; then
    cat "$dir/stdout" "$dir/stderr" >&2 || true
    die "mdpserve (--http-threads $threads --http-slice-us $slice) did not start"
  fi
}

stop_mdpserve() {  # $1 = PID (default: MDP_PID)
  local pid=${1:-$MDP_PID}
  stop_pid "$pid"
  forget_pid "$pid"
  [[ $pid != "$MDP_PID" ]] || MDP_PID=""
}

# State names of the model, in document order: the query rotation.
mapfile -t STATES < <(python3 -c '
import json, sys
doc = json.load(open(sys.argv[1]))
for s in doc.get("states", []):
    print(s["name"])' "$MODEL")
(( ${#STATES[@]} > 0 )) || die "the model $MODEL lists no states"

# --- Machine and tools -------------------------------------------------------------------
echo "== machine"
echo "nproc:      $(nproc)"
echo "cpu:        $(sed -n 's/^model name[[:space:]]*: //p' /proc/cpuinfo | head -1)"
echo "kernel:     $(uname -sr)"
echo "loadavg:    $(cut -d' ' -f1-3 /proc/loadavg) (before the runs)"
echo "== tools"
echo "wrk:        $(wrk -v 2>&1 | head -1 | sed 's/ Copyright.*//')"
echo "nginx:      $("$NGINX_BIN" -v 2>&1 | sed 's/^nginx version: //')"
echo "curl:       $(curl --version | head -1 | cut -d' ' -f1-2)"
httplib_version=$(sed -n 's/^#define CPPHTTPLIB_VERSION "\(.*\)"/\1/p' /usr/include/httplib.h 2>/dev/null | head -1)
echo "cpp-httplib: ${httplib_version:-unknown} (/usr/include/httplib.h)"
build_type=$(grep -s '^CMAKE_BUILD_TYPE' "$(dirname "$MDPSERVE")/../CMakeCache.txt" | cut -d= -f2 || true)
echo "mdpserve:   $MDPSERVE${build_type:+ ($build_type build)}"
echo "model:      $MODEL (${#STATES[@]} states)"
echo "load:       wrk -t$WRK_THREADS -c$CONNECTIONS -d${SECONDS_PER_RUN}s --latency, keep-alive"
echo "slices:     --http-slice-us $HTTP_SLICES_LIST (0: the kernel's default)"
echo "cpus:       servers ${SERVER_CPUS:-not pinned}, wrk ${WRK_CPUS:-not pinned}"

# --- The answer nginx serves: one real best-action answer from mdpserve -------------------
first_threads=${HTTP_THREADS_LIST%% *}
first_slice=${HTTP_SLICES_LIST%% *}
start_mdpserve "$first_threads" "$first_slice"
mkdir -p "$WORK/nginx/www" "$WORK/nginx/tmp"
# Fetch every state's answer once (checks they all answer 200), then let nginx serve the
# answer of median size, so both servers send bodies of the same typical length.
sizes=()
for s in "${STATES[@]}"; do
  curl -sf --max-time 5 -o "$WORK/answer-$s.json" \
    "http://127.0.0.1:$MDP_PORT/v1/models/$MODEL_ID/policy?state=$s" ||
    die "mdpserve did not answer the best action of state '$s'"
  sizes+=("$(wc -c <"$WORK/answer-$s.json") $s")
done
mapfile -t sorted < <(printf '%s\n' "${sizes[@]}" | sort -n)
ANSWER_STATE=${sorted[$(( ${#sorted[@]} / 2 ))]#* }
cp "$WORK/answer-$ANSWER_STATE.json" "$WORK/nginx/www/answer.json"
ANSWER_BYTES=$(wc -c <"$WORK/nginx/www/answer.json")
echo "answer:     $ANSWER_BYTES bytes (state $ANSWER_STATE; mdpserve bodies range" \
     "${sorted[0]%% *}..${sorted[-1]%% *} bytes over the ${#STATES[@]} rotated states)"

# --- nginx: private prefix, 2 workers, keep-alive, no access log --------------------------
NGINX_PID="" NGINX_PORT=""
nginx_user=""
if [[ $(id -u) == 0 ]]; then  # Workers drop to an unprivileged user; they only read www/.
  if getent group nogroup >/dev/null; then nginx_user="user nobody nogroup;"
  else nginx_user="user nobody;"; fi
  chmod 755 "$WORK" "$WORK/nginx" "$WORK/nginx/www"
  chmod 644 "$WORK/nginx/www/answer.json"
fi
for attempt in 1 2 3 4 5; do
  NGINX_PORT=$(free_port)
  cat >"$WORK/nginx/nginx.conf" <<EOF
$nginx_user
worker_processes $NGINX_WORKERS;
daemon off;
pid $WORK/nginx/nginx.pid;
error_log $WORK/nginx/error.log warn;
events { worker_connections 4096; }
http {
  access_log off;
  keepalive_timeout 30;
  keepalive_requests 1000000;
  sendfile on;
  tcp_nodelay on;
  server_tokens off;
  types { application/json json; }
  default_type application/json;
  client_body_temp_path $WORK/nginx/tmp/body;
  proxy_temp_path $WORK/nginx/tmp/proxy;
  fastcgi_temp_path $WORK/nginx/tmp/fastcgi;
  uwsgi_temp_path $WORK/nginx/tmp/uwsgi;
  scgi_temp_path $WORK/nginx/tmp/scgi;
  server {
    listen 127.0.0.1:$NGINX_PORT;
    root $WORK/nginx/www;
    location = /answer.json { }
  }
}
EOF
  (on_cpus "$SERVER_CPUS" "$NGINX_BIN" -p "$WORK/nginx" -c "$WORK/nginx/nginx.conf" \
     -e "$WORK/nginx/error.log") >"$WORK/nginx/stdout" 2>"$WORK/nginx/stderr" &
  NGINX_PID=$!
  PIDS+=("$NGINX_PID")
  if wait_http_ok "$NGINX_PID" "http://127.0.0.1:$NGINX_PORT/answer.json"; then break; fi
  stop_pid "$NGINX_PID"; forget_pid "$NGINX_PID"; NGINX_PID=""
  (( attempt < 5 )) || { cat "$WORK/nginx/stderr" "$WORK/nginx/error.log" >&2 2>/dev/null || true
                         die "nginx did not start"; }
done
curl -sf -o "$WORK/nginx/check.json" -D "$WORK/nginx/check.headers" \
  "http://127.0.0.1:$NGINX_PORT/answer.json" || die "nginx does not serve the answer"
cmp -s "$WORK/nginx/check.json" "$WORK/nginx/www/answer.json" ||
  die "nginx serves different bytes than mdpserve's answer"
grep -qi '^content-type: application/json' "$WORK/nginx/check.headers" ||
  die "nginx does not serve the answer as application/json"
echo "nginx:      127.0.0.1:$NGINX_PORT/answer.json (pid $NGINX_PID, $NGINX_WORKERS workers)"

# --- wrk script: rotates over the paths given after `--`, reports in done() -------------
cat >"$WORK/rotate.lua" <<'EOF'
-- Each wrk thread rotates over the request paths given as script arguments.
local requests, n, i = {}, 0, 0
function init(args)
  for _, path in ipairs(args) do
    n = n + 1
    requests[n] = wrk.format("GET", path)
  end
  if n == 0 then
    n = 1
    requests[1] = wrk.format("GET", wrk.path)
  end
  i = math.random(n) - 1  -- Threads start at different places in the rotation.
end
function request()
  i = i % n + 1
  return requests[i]
end
function done(summary, latency, requests)
  local e = summary.errors
  io.write(string.format(
    "BENCH requests=%d duration_us=%d p50_us=%d p90_us=%d p99_us=%d max_us=%d " ..
    "non2xx=%d connect=%d read=%d write=%d timeout=%d\n",
    summary.requests, summary.duration, latency:percentile(50), latency:percentile(90),
    latency:percentile(99), latency.max, e.status, e.connect, e.read, e.write, e.timeout))
end
EOF

MDP_PATHS=()
for s in "${STATES[@]}"; do MDP_PATHS+=("/v1/models/$MODEL_ID/policy?state=$s"); done

# Kernel-wide count of connections dropped because a listen queue was full.
listen_overflows() {
  awk '/^TcpExt:/ { if (!h) { for (i = 1; i <= NF; i++) if ($i == "ListenOverflows") c = i; h = 1 }
                    else { print $c; exit } }' /proc/net/netstat
}

# CPU time (clock ticks) used so far by PID and its child processes that are still alive
# (nginx: master + workers; mdpserve: all its threads).
cpu_ticks() {
  local pid=$1 total=0 p
  for p in $pid $(cat /proc/"$pid"/task/*/children 2>/dev/null); do
    [[ -r /proc/$p/stat ]] || continue
    total=$(( total + $(awk '{ sub(/^.*\) /, ""); print $12 + $13 }' /proc/"$p"/stat) ))
  done
  echo "$total"
}

# "peer bytes_sent" for each established connection whose local port is $1 (server side).
conn_bytes_sent() {
  command -v ss >/dev/null || return 0
  ss -tniH state established "( sport = :$1 )" 2>/dev/null | awk '
    /^[[:space:]]/ { if (peer != "") { v = 0
                       if (match($0, /bytes_sent:[0-9]+/)) v = substr($0, RSTART + 11, RLENGTH - 11)
                       print peer, v; peer = "" }
                     next }
    { peer = $NF }'
}

# Runs wrk against one server and sets RESULT to "rps p50_us p99_us non2xx socket_errors
# requests listen_overflows server_cpu_us_per_request stalled_connections".
# wrk only records requests that were answered, so a connection the server never serves
# is invisible in its numbers: the server-side sockets are sampled at 1/3 and 2/3 of the
# run, and a connection that sent no byte between the samples counts as stalled.
RESULT=""
run_wrk() {  # $1 = label, $2 = server PID, $3 = server port, rest = paths
  local label=$1 pid=$2 port=$3 out="$WORK/wrk-$1.txt" ovf0 cpu0 wrk_pid rc=0 third
  shift 3
  ovf0=$(listen_overflows)
  cpu0=$(cpu_ticks "$pid")
  (on_cpus "$WRK_CPUS" timeout $((SECONDS_PER_RUN + 30)) wrk -t"$WRK_THREADS" -c"$CONNECTIONS" \
    -d"${SECONDS_PER_RUN}s" --latency -s "$WORK/rotate.lua" "http://127.0.0.1:$port" \
    -- "$@") >"$out" 2>&1 &
  wrk_pid=$!
  PIDS+=("$wrk_pid")
  third=$(python3 -c "print($SECONDS_PER_RUN / 3)")
  sleep "$third"; conn_bytes_sent "$port" >"$WORK/conns-$label-1.txt"
  sleep "$third"; conn_bytes_sent "$port" >"$WORK/conns-$label-2.txt"
  wait "$wrk_pid" || rc=$?
  forget_pid "$wrk_pid"
  if (( rc != 0 )); then
    cat "$out" >&2
    die "wrk failed against 127.0.0.1:$port (exit $rc)"
  fi
  local ovf=$(( $(listen_overflows) - ovf0 )) cpu=$(( $(cpu_ticks "$pid") - cpu0 ))
  RESULT=$(python3 - "$out" "$ovf" "$cpu" "$(getconf CLK_TCK)" \
    "$WORK/conns-$label-1.txt" "$WORK/conns-$label-2.txt" <<'EOF'
import re, sys
text = open(sys.argv[1]).read()
ovf, ticks, hz = int(sys.argv[2]), int(sys.argv[3]), int(sys.argv[4])
def sample(path):
    return dict(line.split() for line in open(path) if line.strip())
first, second = sample(sys.argv[5]), sample(sys.argv[6])
stalled = sum(1 for peer, sent in first.items() if second.get(peer) == sent)
m = re.search(r"^BENCH (.*)$", text, re.M)
if not m:
    sys.exit("no BENCH line in wrk output")
v = {k: int(x) for k, x in (kv.split("=") for kv in m.group(1).split())}
rps = v["requests"] / (v["duration_us"] / 1e6)
sock = v["connect"] + v["read"] + v["write"] + v["timeout"]
cpu_us = ticks / hz * 1e6 / max(v["requests"], 1)
print(f'{rps:.0f} {v["p50_us"]} {v["p99_us"]} {v["non2xx"]} {sock} {v["requests"]} {ovf} '
      f'{cpu_us:.1f} {stalled}')
EOF
  ) || die "cannot parse the wrk output $out"
}

# An unrecorded wrk run of WARMUP_SECONDS against port $1, path $2.
warm_up() {
  local wrk_pid rc=0
  (on_cpus "$WRK_CPUS" timeout $((WARMUP_SECONDS + 30)) wrk -t"$WRK_THREADS" -c"$CONNECTIONS" \
    -d"${WARMUP_SECONDS}s" "http://127.0.0.1:$1$2") >"$WORK/warm-up.txt" 2>&1 &
  wrk_pid=$!
  PIDS+=("$wrk_pid")
  wait "$wrk_pid" || rc=$?
  forget_pid "$wrk_pid"
  (( rc == 0 )) || { cat "$WORK/warm-up.txt" >&2; die "the warm-up run against port $1 failed"; }
}

# --- Runs: nginx, then each slice's mdpserve, round by round, per --http-threads value ----
# The servers of one --http-threads value run side by side (only the one measured is busy),
# so that each round compares runs made seconds apart.
ROWS=()  # "server threads slice round rps p50 p99 non2xx sock stalled requests ovf cpu ratio"
for threads in $HTTP_THREADS_LIST; do
  # The model's id is its content hash, the same on every server: MDP_PATHS serves them all.
  declare -A SLICE_PID=() SLICE_PORT=()
  for slice in $HTTP_SLICES_LIST; do
    if [[ -z $MDP_PID ]]; then start_mdpserve "$threads" "$slice"; fi
    SLICE_PID[$slice]=$MDP_PID SLICE_PORT[$slice]=$MDP_PORT
    MDP_PID=""
  done
  if (( WARMUP_SECONDS > 0 )); then
    echo "-- warm-up, ${WARMUP_SECONDS} s per server (not recorded) ..." >&2
    warm_up "$NGINX_PORT" "/answer.json"
    for slice in $HTTP_SLICES_LIST; do
      warm_up "${SLICE_PORT[$slice]}" "${MDP_PATHS[0]}"
    done
  fi
  for round in $(seq "$ROUNDS"); do
    echo "-- round $round, mdpserve --http-threads $threads: nginx ..." >&2
    run_wrk "nginx-t$threads-r$round" "$NGINX_PID" "$NGINX_PORT" "/answer.json"
    read -r n_rps n_p50 n_p99 n_non2xx n_sock n_req n_ovf n_cpu n_stall <<<"$RESULT"
    kill -0 "$NGINX_PID" 2>/dev/null || die "nginx died during the run"
    ROWS+=("nginx - - $round $n_rps $n_p50 $n_p99 $n_non2xx $n_sock $n_stall $n_req $n_ovf $n_cpu -")
    for slice in $HTTP_SLICES_LIST; do
      echo "-- round $round, mdpserve --http-threads $threads --http-slice-us $slice ..." >&2
      run_wrk "mdpserve-t$threads-s$slice-r$round" "${SLICE_PID[$slice]}" "${SLICE_PORT[$slice]}" \
        "${MDP_PATHS[@]}"
      read -r m_rps m_p50 m_p99 m_non2xx m_sock m_req m_ovf m_cpu m_stall <<<"$RESULT"
      kill -0 "${SLICE_PID[$slice]}" 2>/dev/null || die "mdpserve died during the run"
      ratio=$(python3 -c "print(f'{$m_rps / max($n_rps, 1):.3f}')")
      ROWS+=("mdpserve $threads $slice $round $m_rps $m_p50 $m_p99 $m_non2xx $m_sock $m_stall $m_req $m_ovf $m_cpu $ratio")
    done
  done
  for slice in $HTTP_SLICES_LIST; do stop_mdpserve "${SLICE_PID[$slice]}"; done
  unset SLICE_PID SLICE_PORT
done

# --- Report ------------------------------------------------------------------------------
python3 - "$TARGET_RATIO" "$TARGET_P99_US" "${ROWS[@]}" <<'EOF'
import statistics, sys
target_ratio, target_p99 = float(sys.argv[1]), int(sys.argv[2])
rows = [r.split() for r in sys.argv[3:]]
print()
print("== results")
print("   slice    mdpserve's --http-slice-us (0: the kernel's default time slice)")
print("   ratio    mdpserve req/s over the req/s of the round's nginx run")
print("   sockerr  wrk socket errors (connect, read, write, timeout)")
print("   stalled  open connections that got no byte from the server for 1/3 of the run;")
print("            wrk's latencies cannot see them, so they count as errors here")
print("   lsn-ovf  connections the kernel dropped on a full listen queue (host-wide counter)")
print("   cpu/req  server CPU microseconds per answered request")
print("   p50/p99  wrk's, which adds samples for the requests a stall held back (its")
print("            coordinated-omission correction): one 1 s stall can move p99 a lot")
head = (f'{"server":<9} {"http-thr":>8} {"slice":>6} {"round":>5} {"req/s":>8} {"p50 ms":>7} '
        f'{"p99 ms":>8} '
        f'{"non-2xx":>7} {"sockerr":>7} {"stalled":>7} {"requests":>9} {"lsn-ovf":>7} '
        f'{"cpu/req":>7} {"ratio":>6}  targets')
print(head)
print("-" * len(head))
by_threads = {}
for server, thr, slc, rnd, rps, p50, p99, non2xx, sock, stall, req, ovf, cpu, ratio in rows:
    verdict = ""
    errors = int(non2xx) + int(sock) + int(stall)
    if server == "mdpserve":
        miss = []
        if float(ratio) < target_ratio: miss.append(f"ratio<{target_ratio}")
        if int(p99) >= target_p99: miss.append(f"p99>={target_p99/1000:g}ms")
        if errors > 0: miss.append("errors")
        verdict = "ok" if not miss else "MISS " + ",".join(miss)
        by_threads.setdefault((thr, slc), []).append((float(ratio), int(p99), errors))
    print(f'{server:<9} {thr:>8} {slc:>6} {rnd:>5} {int(rps):>8} {int(p50)/1000:>7.3f} '
          f'{int(p99)/1000:>8.3f} {non2xx:>7} {sock:>7} {stall:>7} {req:>9} {ovf:>7} '
          f'{float(cpu):>7.1f} {ratio:>6}  {verdict}')
print()
print(f"== targets: ratio >= {target_ratio}, mdpserve p99 < {target_p99/1000:g} ms, "
      "zero errors (non-2xx + socket errors + stalled connections)")
for (thr, slc), runs in by_threads.items():
    ratio = statistics.median(r for r, _, _ in runs)
    p99 = max(p for _, p, _ in runs)
    errors = sum(e for _, _, e in runs)
    print(f"--http-threads {thr:>4} --http-slice-us {slc:>6}: median ratio {ratio:.3f} "
          f"[{'holds' if ratio >= target_ratio else 'MISSED'}], "
          f"worst p99 {p99/1000:.3f} ms [{'holds' if p99 < target_p99 else 'MISSED'}], "
          f"errors {errors} [{'holds' if errors == 0 else 'MISSED'}]")
EOF
echo "loadavg:    $(cut -d' ' -f1-3 /proc/loadavg) (after the runs)"
exit 0
