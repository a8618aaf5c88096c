#!/usr/bin/python3
"""A solve on a busy host: how long a 2-thread value iteration takes with the OpenMP spin
count mdpserve sets (thread_setup.h: GOMP_SPINCOUNT=5000 unless the operator set it or
OMP_WAIT_POLICY) against the runtime's default (300,000 rounds; set here explicitly, which
mdpserve keeps).

Two `mdpserve serve` processes (127.0.0.1, ephemeral ports, memory store, --solver-threads
2) run side by side, one per setting, each holding the same seeded random model (STATES x 4
actions x 8 outcomes, discount 0.99, written by service_memory.py's generator). Each round,
for each scenario, each server in turn (the order alternates between rounds) solves the model
by value iteration to a tolerance that differs per round and scenario (so that no solve is
answered from the cache):
  idle     nothing else runs;
  busy     beside --busy-loops busy loops in other processes at nice 0 (a host shared with
           other work; the solve runs at the background nice value, 10);
  queries  beside `wrk -t1 -c64` asking the same server for the model's best action as fast
           as it answers (the solve runs at the background nice value, below the queries).
The solve's own time (the solution report's solve_seconds) per sweep is compared.

Prints one JSON object: the runs and, per scenario, the median seconds per sweep of each
setting and their ratio. Every process started is stopped by its PID.

    /usr/bin/python3 scripts/bench/contended_solve_bench.py --mdpserve BIN
        [--states 40000] [--rounds 3] [--busy-loops 2]
"""
import argparse
import json
import os
import signal
import statistics
import subprocess
import sys
import tempfile
import time

sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))
from service_memory import Server, write_arrays_model  # noqa: E402

SOLVE_TIMEOUT = 600.0
SETTINGS = {"runtime default (GOMP_SPINCOUNT=300000)": "300000",
            "mdpserve default (5000)": None}


def start_server(binary, workdir, spin):
    """A server whose environment has GOMP_SPINCOUNT=spin (none if None) and no
    OMP_WAIT_POLICY; returns it and the OpenMP variables it runs with, from /proc."""
    env = {k: v for k, v in os.environ.items() if k not in ("GOMP_SPINCOUNT", "OMP_WAIT_POLICY")}
    if spin is not None:
        env["GOMP_SPINCOUNT"] = spin
    os.makedirs(workdir)
    server = Server(binary, workdir, 1 << 30, True, ["--solver-threads", "2"], env)
    with open("/proc/%d/environ" % server.proc.pid, "rb") as f:
        environ = [e.decode() for e in f.read().split(b"\0")
                   if e.startswith(b"GOMP_") or e.startswith(b"OMP_")]
    return server, environ


def call(server, method, path, body=None):
    status, data = server.request(method, path, body)
    return status, json.loads(data or b"null")


def solve(server, model_id, tolerance):
    """Runs a value iteration job to its end; returns the solution report."""
    body = json.dumps({"model_id": model_id, "options": {
        "method": "value_iteration", "tolerance": tolerance}}).encode()
    status, job = call(server, "POST", "/v1/jobs", body)
    if status != 202:
        raise RuntimeError("solve not started: %s %s" % (status, job))
    deadline = time.monotonic() + SOLVE_TIMEOUT
    while time.monotonic() < deadline:
        status, view = call(server, "GET", "/v1/jobs/" + job["id"])
        if view["status"] not in ("queued", "running"):
            break
        time.sleep(0.02)
    if view["status"] != "succeeded":
        raise RuntimeError("solve ended %s" % view)
    status, report = call(
        server, "GET", "/v1/models/%s/solutions/%s" % (model_id, view["solution_id"]))
    return report


def main():
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--mdpserve", required=True)
    parser.add_argument("--states", type=int, default=40000)
    parser.add_argument("--rounds", type=int, default=3)
    parser.add_argument("--busy-loops", type=int, default=2)
    args = parser.parse_args()
    runs = []
    servers, environ = {}, {}
    helpers = []
    with tempfile.TemporaryDirectory(prefix="mdpserve-contended-") as work:
        try:
            model = os.path.join(work, "model.json")
            write_arrays_model(model, args.states, 4, 8, seed=7, discount=0.99)
            with open(model, "rb") as f:
                doc = f.read()
            ids = {}
            for i, (setting, spin) in enumerate(SETTINGS.items()):
                servers[setting], environ[setting] = start_server(
                    os.path.abspath(args.mdpserve), os.path.join(work, "s%d" % i), spin)
                status, up = call(servers[setting], "POST", "/v1/models", doc)
                if status not in (200, 201):
                    raise RuntimeError("upload refused: %s %s" % (status, up))
                ids[setting] = up["id"]
            order = list(SETTINGS)
            for r in range(args.rounds):
                for k, scenario in enumerate(("idle", "busy", "queries")):
                    for setting in (order if r % 2 == 0 else order[::-1]):
                        server = servers[setting]
                        tolerance = 1e-6 * (1 + 0.01 * (3 * r + k))
                        if scenario == "busy":
                            helpers = [subprocess.Popen(["/bin/sh", "-c", "while :; do :; done"])
                                       for _ in range(args.busy_loops)]
                        elif scenario == "queries":
                            url = "http://127.0.0.1:%d/v1/models/%s/policy?state=s1" % (
                                server.port, ids[setting])
                            helpers = [subprocess.Popen(
                                ["wrk", "-t1", "-c64", "-d600s", url],
                                stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)]
                        time.sleep(0.5 if helpers else 0)
                        try:
                            report = solve(server, ids[setting], tolerance)
                        finally:
                            for h in helpers:
                                os.kill(h.pid, signal.SIGKILL)
                                h.wait()
                            helpers = []
                        runs.append({"round": r, "scenario": scenario, "setting": setting,
                                     "solve_seconds": report["solve_seconds"],
                                     "sweeps": report["sweeps"],
                                     "seconds_per_sweep": report["solve_seconds"] /
                                     max(1, report["sweeps"])})
                        print("round %d %-8s %-40s %.2f s, %d sweeps" % (
                            r, scenario, setting, report["solve_seconds"], report["sweeps"]),
                            file=sys.stderr)
        finally:
            for h in helpers:
                os.kill(h.pid, signal.SIGKILL)
                h.wait()
            for s in servers.values():
                s.stop()
    summary = {}
    for scenario in ("idle", "busy", "queries"):
        med = {s: statistics.median(x["seconds_per_sweep"] for x in runs
                                    if x["scenario"] == scenario and x["setting"] == s)
               for s in SETTINGS}
        base, ours = med[order[0]], med[order[1]]
        summary[scenario] = {"median_seconds_per_sweep": med,
                             "runtime_default_over_mdpserve": base / ours}
    print(json.dumps({"kind": "contended_solve", "states": args.states,
                      "busy_loops": args.busy_loops, "rounds": args.rounds,
                      "server_environment": environ,
                      "runs": runs, "summary": summary}))
    return 0


if __name__ == "__main__":
    sys.exit(main())
