#!/usr/bin/python3
"""Queries while a solve runs: what a long solve job costs the best-action queries, with the
solve's threads at the HTTP threads' priority and below them (--background-niceness).

Two `mdpserve serve` processes (127.0.0.1, ephemeral ports, memory store) run side by side:
one with --background-niceness 0 (the solve at the HTTP threads' priority) and one with the
value under test (default 10, the service's default). Each holds a small solved model to
query (api-schema/examples/pump-maintenance.json) and a seeded random model large enough that
value iteration on it runs until its time limit (STATES x 4 actions x 8 outcomes, discount
0.9999, written by service_memory.py's generator in the arrays encoding).

Each round, for each server in turn (the order alternates between rounds): start a value
iteration job on the large model (a different time limit each round, so that no solve is
answered from the cache), wait until it sweeps, note its progress, wait --solo-seconds and
note it again (the solve's sweeps per second alone), run wrk with paced requests (each
connection waits --delay-ms between an answer and its next request, so the query load is
fixed rather than as fast as the server goes) for --seconds, note the progress again (the
solve's sweeps per second beside the queries), cancel the job and wait for it to end. Then
the same wrk run on the server with the lower priority and no solve running, for reference.

Prints one JSON object: the runs (server, round, requests/s, p50, p99, errors, the solve's
sweeps per second alone and with the queries). Every process started is stopped by its PID.

    /usr/bin/python3 scripts/bench/solve_load_bench.py --mdpserve BIN --root REPO
        [--states 250000] [--rounds 3] [--seconds 10] [--solo-seconds 2]
        [--connections 32] [--delay-ms 4] [--niceness 10]
"""
import argparse
import json
import os
import re
import shutil
import subprocess
import sys
import tempfile
import time

sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))
from service_memory import Server, write_arrays_model  # noqa: E402

JOB_START_TIMEOUT = 120.0
WRK_GRACE = 30.0  # Seconds wrk may take beyond its own duration before it is killed.

PACED_SCRIPT = """
local paths = {}
local i = 0
function init(args) for _, a in ipairs(args) do paths[#paths + 1] = a end end
function request() i = i %% #paths + 1; return wrk.format("GET", paths[i]) end
function delay() return %d end
"""


def seconds_of(text):
    """wrk's latency figure ("812.00us", "1.23ms", "2.01s") in seconds."""
    m = re.match(r"^([0-9.]+)(us|ms|s)$", text)
    if not m:
        raise ValueError("unreadable wrk latency %r" % text)
    return float(m.group(1)) * {"us": 1e-6, "ms": 1e-3, "s": 1.0}[m.group(2)]


def parse_wrk(out):
    """requests/s, p50, p99 (seconds) and errors (non-2xx + socket errors) of wrk --latency."""
    rps = re.search(r"Requests/sec:\s+([0-9.]+)", out)
    p50 = re.search(r"^\s+50%\s+(\S+)", out, re.M)
    p99 = re.search(r"^\s+99%\s+(\S+)", out, re.M)
    if not (rps and p50 and p99):
        raise RuntimeError("unreadable wrk output:\n" + out[-1500:])
    errors = sum(int(n) for n in re.findall(r"Non-2xx or 3xx responses:\s+(\d+)", out))
    socket = re.search(r"Socket errors: connect (\d+), read (\d+), write (\d+), timeout (\d+)", out)
    if socket:
        errors += sum(int(n) for n in socket.groups())
    return {"requests_per_second": float(rps.group(1)), "p50_seconds": seconds_of(p50.group(1)),
            "p99_seconds": seconds_of(p99.group(1)), "errors": errors}


class Side:
    """One server with its two models."""

    def __init__(self, args, name, niceness, workdir, small_doc, large_doc):
        os.makedirs(workdir)
        self.name, self.niceness = name, niceness
        self.server = Server(args.mdpserve, workdir, os.path.getsize(large_doc) + (1 << 20),
                             True, ["--background-niceness", str(niceness)])
        self.small = self.upload(small_doc)
        self.large = self.upload(large_doc)
        job = self.start_job(self.small, {})
        self.wait_finished(job)
        status, body = self.server.request("GET", "/v1/models/%s/solutions" % self.small)
        if status != 200:
            raise RuntimeError("%s: the small model has no solution: %s" % (name, body[:300]))
        with open(small_doc) as f:
            states = [s["name"] for s in json.load(f)["states"]]
        self.paths = ["/v1/models/%s/policy?state=%s" % (self.small, s) for s in states]

    def upload(self, path):
        with open(path, "rb") as f:
            status, body = self.server.request("POST", "/v1/models", f, os.path.getsize(path))
        if status not in (200, 201):
            raise RuntimeError("%s: upload of %s answered %d: %s" % (self.name, path, status,
                                                                     body[:300]))
        return json.loads(body)["id"]

    def start_job(self, model_id, options):
        status, body = self.server.request("POST", "/v1/jobs", json.dumps(
            {"model_id": model_id, "options": options}).encode())
        if status != 202:
            raise RuntimeError("%s: solve answered %d: %s" % (self.name, status, body[:300]))
        return json.loads(body)["id"]

    def job(self, job_id):
        status, body = self.server.request("GET", "/v1/jobs/" + job_id)
        if status != 200:
            raise RuntimeError("%s: job %s answered %d" % (self.name, job_id, status))
        return json.loads(body)

    def wait_finished(self, job_id):
        deadline = time.monotonic() + JOB_START_TIMEOUT
        while time.monotonic() < deadline:
            view = self.job(job_id)
            if view["status"] in ("succeeded", "failed", "cancelled"):
                return view
            time.sleep(0.05)
        raise RuntimeError("%s: job %s did not end" % (self.name, job_id))

    def progress(self, job_id):
        """(sweeps, elapsed seconds) of a running job."""
        view = self.job(job_id)
        if view["status"] != "running":
            raise RuntimeError("%s: the solve is %s, not running: the window needs a longer "
                               "solve" % (self.name, view["status"]))
        p = view.get("progress") or {}
        return p.get("sweeps", 0), p.get("elapsed_seconds", 0.0)

    def wrk(self, args, script):
        cmd = ["wrk", "-t1", "-c%d" % args.connections, "-d%ds" % args.seconds, "--latency",
               "-s", script, "http://127.0.0.1:%d" % self.server.port, "--"] + self.paths
        done = subprocess.run(cmd, capture_output=True, text=True,
                              timeout=args.seconds + WRK_GRACE)
        if done.returncode != 0:
            raise RuntimeError("wrk failed: %s" % done.stderr[-500:])
        return parse_wrk(done.stdout)

    def measure_with_solve(self, args, script, round_index):
        options = {"method": "value_iteration", "tolerance": 1e-14, "max_iterations": 10**9,
                   "time_limit_seconds": args.solo_seconds + args.seconds + 60 + round_index}
        job_id = self.start_job(self.large, options)
        deadline = time.monotonic() + JOB_START_TIMEOUT
        while True:
            view = self.job(job_id)
            if view["status"] == "running" and (view.get("progress") or {}).get("sweeps", 0) > 0:
                break
            if view["status"] in ("succeeded", "failed", "cancelled") or \
                    time.monotonic() > deadline:
                raise RuntimeError("%s: the solve did not start sweeping: %s" % (self.name, view))
            time.sleep(0.05)
        sweeps0, elapsed0 = self.progress(job_id)
        time.sleep(args.solo_seconds)
        sweeps1, elapsed1 = self.progress(job_id)
        result = self.wrk(args, script)
        sweeps2, elapsed2 = self.progress(job_id)
        status, body = self.server.request("POST", "/v1/jobs/%s/cancel" % job_id, b"")
        if status not in (200, 202):
            raise RuntimeError("%s: cancel answered %d: %s" % (self.name, status, body[:300]))
        self.wait_finished(job_id)
        result.update({
            "solve_sweeps_per_second_alone": (sweeps1 - sweeps0) / max(elapsed1 - elapsed0, 1e-9),
            "solve_sweeps_per_second_with_queries":
                (sweeps2 - sweeps1) / max(elapsed2 - elapsed1, 1e-9),
        })
        return result


def main():
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--mdpserve", required=True)
    ap.add_argument("--root", required=True, help="repository root (for the example model)")
    ap.add_argument("--states", type=int, default=250_000)
    ap.add_argument("--rounds", type=int, default=3)
    ap.add_argument("--seconds", type=int, default=10)
    ap.add_argument("--solo-seconds", type=float, default=2.0)
    ap.add_argument("--connections", type=int, default=32)
    ap.add_argument("--delay-ms", type=int, default=4)
    ap.add_argument("--niceness", type=int, default=10)
    args = ap.parse_args()
    if shutil.which("wrk") is None:
        sys.exit("solve_load_bench: wrk is not installed (scripts/install-deps.sh installs it)")

    workdir = tempfile.mkdtemp(prefix="mdp-solve-load.")
    sides = []
    try:
        small_doc = os.path.join(args.root, "api-schema", "examples", "pump-maintenance.json")
        large_doc = os.path.join(workdir, "large-arrays.json")
        write_arrays_model(large_doc, args.states, 4, 8, 1, discount=0.9999)
        script = os.path.join(workdir, "paced.lua")
        with open(script, "w") as f:
            f.write(PACED_SCRIPT % args.delay_ms)
        same = Side(args, "same_priority", 0, os.path.join(workdir, "same"), small_doc, large_doc)
        sides.append(same)
        lower = Side(args, "lower_priority", args.niceness, os.path.join(workdir, "lower"),
                     small_doc, large_doc)
        sides.append(lower)
        runs = []
        for r in range(args.rounds):
            order = [same, lower] if r % 2 == 0 else [lower, same]
            for side in order:
                runs.append({"round": r + 1, "server": side.name, "niceness": side.niceness,
                             "solve": True, **side.measure_with_solve(args, script, r)})
            runs.append({"round": r + 1, "server": lower.name, "niceness": lower.niceness,
                         "solve": False, **lower.wrk(args, script)})
        print(json.dumps({
            "kind": "solve_load", "states": args.states, "actions": 4, "outcomes": 8,
            "discount": 0.9999, "seconds": args.seconds, "solo_seconds": args.solo_seconds,
            "connections": args.connections, "delay_ms": args.delay_ms,
            "niceness": args.niceness, "runs": runs}))
    finally:
        for side in sides:
            side.server.stop()
        shutil.rmtree(workdir, ignore_errors=True)


if __name__ == "__main__":
    main()
