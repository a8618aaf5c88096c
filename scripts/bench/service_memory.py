#!/usr/bin/python3
"""Service memory: how much a running `mdpserve serve` holds for one solved large model,
against the raw bytes of that model's arrays. Prints one JSON object.

Steps: writes a seeded STATES x ACTIONS x OUTCOMES model in the compact arrays encoding
(mdpserve/model-arrays@1) unless --document names one; starts `mdpserve serve` on 127.0.0.1
(ephemeral port, embedded store in a temporary directory); reads VmRSS/VmHWM of the idle
server; POSTs the document to /v1/models; solves it (value iteration, loose tolerance: it is
the memory we measure, not the solve); reads VmRSS/VmHWM again and the byte gauges of
/metrics (mdpserve_cached_model_bytes, mdpserve_cached_solution_bytes); stops the server by
PID (SIGTERM, SIGKILL after a timeout). Last, GETs the model's canonical document (checking
that its SHA-256 starts with the model id) while sampling VmRSS, to show what serving the
document costs.

Raw bytes (the yardstick) are the numeric arrays the solver needs, each element stored once
in binary, with the document's counts:
  per outcome: next state (int32, 4 B) + probability (float64, 8 B)
  per row (state action): action (int32, 4 B) + expected reward (float64, 8 B)
                          + first-outcome offset (int64, 8 B)
  per state: first-row offset (int64, 8 B)
  Q-table: one float64 per row (8 B).
Names, per-outcome rewards (folded into the row's expected reward) and the runtime are not
counted. The verdict compares the server's whole resident memory (VmRSS) after the solve
with 1.5 x raw bytes; the increase over the idle server is reported beside it.

    /usr/bin/python3 scripts/bench/service_memory.py --mdpserve BIN
        [--states 1000000 --actions 4 --outcomes 8 --seed 1] [--document FILE]
        [--write-only FILE] [--tolerance 1e-2] [--keep-document]
"""
import argparse
import hashlib
import http.client
import json
import os
import re
import shutil
import signal
import subprocess
import sys
import tempfile
import threading
import time

import numpy as np

START_TIMEOUT = 30.0
STOP_TIMEOUT = 30.0
JOB_TIMEOUT = 1800.0
TARGET_RATIO = 1.5
CHUNK = 1 << 20  # Array items formatted per write.


# --- The model document ----------------------------------------------------------------------

def write_column(f, name, items, fmt):
    """Writes `"name":[...]` with the items of the numpy array `items` formatted by fmt."""
    f.write(b',"' + name.encode() + b'":[')
    for begin in range(0, len(items), CHUNK):
        if begin:
            f.write(b",")
        f.write(fmt(items[begin:begin + CHUNK]).encode())
    f.write(b"]")


def ints(a):
    return ",".join(map(str, a.tolist()))


def floats(a):
    return ",".join(map(repr, a.tolist()))  # Shortest round-trip form: the exact double.


def write_arrays_model(path, states, actions, outcomes, seed, discount=0.95):
    """A seeded random model: every state offers every action; each row has `outcomes`
    next states drawn uniformly (so rows rarely merge duplicates), probability 1/outcomes
    each (exact for powers of two), a row reward and a full-precision reward per outcome.
    Returns (rows, outcome count)."""
    rng = np.random.default_rng(seed)
    rows = states * actions
    n = rows * outcomes
    with open(path, "wb") as f:
        f.write(b'{"format":"mdpserve/model-arrays@1","name":"memory-check","objective":'
                b'"maximize","criterion":{"kind":"discounted","discount":' + repr(discount).encode() +
                b'},"actions":[')
        f.write(",".join('"a%d"' % a for a in range(actions)).encode() + b"]")
        f.write(b',"states":[')
        for begin in range(0, states, CHUNK):
            if begin:
                f.write(b",")
            end = min(states, begin + CHUNK)
            f.write(",".join('"s%d"' % s for s in range(begin, end)).encode())
        f.write(b"]")
        write_column(f, "sa_state", np.repeat(np.arange(states), actions), ints)
        write_column(f, "sa_action", np.tile(np.arange(actions), states), ints)
        write_column(f, "sa_reward", np.tile(-0.1 * np.arange(actions), states), floats)
        write_column(f, "sa_outcomes", np.full(rows, outcomes), ints)
        write_column(f, "next", rng.integers(0, states, n), ints)
        p = repr(1.0 / outcomes)
        f.write(b',"probability":[')
        for begin in range(0, n, CHUNK):
            f.write(((b"," if begin else b"") + ",".join([p] * min(CHUNK, n - begin)).encode()))
        f.write(b"]")
        write_column(f, "reward", rng.uniform(-5.0, 5.0, n), floats)
        f.write(b"}")
    return rows, n


def raw_bytes(states, rows, outcomes):
    """The yardstick of the module docstring, by part."""
    return {"outcomes": outcomes * (4 + 8), "rows": rows * (4 + 8 + 8),
            "states": (states + 1) * 8, "q_table": rows * 8}


# --- The server ------------------------------------------------------------------------------

def proc_status(pid):
    """VmRSS and VmHWM of `pid` in bytes."""
    out = {}
    with open("/proc/%d/status" % pid) as f:
        for line in f:
            key, _, value = line.partition(":")
            if key in ("VmRSS", "VmHWM"):
                out[key] = int(value.split()[0]) * 1024
    return out


class Server:
    """`mdpserve serve` on 127.0.0.1, an ephemeral port, its files in `workdir`; `extra`
    flags are appended to the command line; `env`, if given, is its whole environment."""

    def __init__(self, binary, workdir, body_limit, memory_store, extra=(), env=None):
        self.port_file = os.path.join(workdir, "port")
        self.log = open(os.path.join(workdir, "server.log"), "wb")
        store = (["--memory-store"] if memory_store
                 else ["--data-dir", os.path.join(workdir, "data")])
        self.proc = subprocess.Popen(
            [binary, "serve", "--listen", "127.0.0.1:0", "--port-file", self.port_file,
             "--log-level", "warn", "--body-limit", str(body_limit), "--workers", "1"] + store +
            list(extra),
            stdout=self.log, stderr=subprocess.STDOUT, stdin=subprocess.DEVNULL, env=env)
        self.port = None
        deadline = time.monotonic() + START_TIMEOUT
        while time.monotonic() < deadline and self.port is None:
            if self.proc.poll() is not None:
                raise RuntimeError("mdpserve serve exited with %s" % self.proc.returncode)
            if os.path.exists(self.port_file):
                text = open(self.port_file).read().strip()
                self.port = int(text) if text else None
            time.sleep(0.02)
        if self.port is None:
            raise RuntimeError("mdpserve serve wrote no port file")

    def request(self, method, path, body=None, length=None):
        conn = http.client.HTTPConnection("127.0.0.1", self.port, timeout=JOB_TIMEOUT)
        try:
            headers = {"Content-Type": "application/json"} if body is not None else {}
            if length is not None:
                headers["Content-Length"] = str(length)
            conn.request(method, path, body=body, headers=headers)
            r = conn.getresponse()
            return r.status, r.read()
        finally:
            conn.close()

    def stop(self):
        """SIGTERM by PID, SIGKILL if it does not end in time."""
        if self.proc.poll() is None:
            os.kill(self.proc.pid, signal.SIGTERM)
            try:
                self.proc.wait(timeout=STOP_TIMEOUT)
            except subprocess.TimeoutExpired:
                os.kill(self.proc.pid, signal.SIGKILL)
                self.proc.wait(timeout=STOP_TIMEOUT)
        self.log.close()


def gauge(metrics, name):
    """Sum of the samples of gauge `name` in Prometheus text."""
    total = 0.0
    for line in metrics.splitlines():
        m = re.match(r"^%s(\{[^}]*\})?\s+(\S+)$" % re.escape(name), line)
        if m:
            total += float(m.group(2))
    return total


def settle(pid, seconds=1.0):
    """Status after a short pause (the worker finishes storing and freeing)."""
    time.sleep(seconds)
    return proc_status(pid)


class UploadRefused(Exception):
    pass


def fetch_document(server, model_id):
    """GETs the model's canonical document, hashing it as it arrives (its SHA-256 must start
    with the model id), while a thread samples the server's VmRSS every 20 ms."""
    samples, done = [], threading.Event()

    def sample():
        while not done.is_set():
            samples.append(proc_status(server.proc.pid)["VmRSS"])
            time.sleep(0.02)

    sampler = threading.Thread(target=sample)
    sampler.start()
    conn = http.client.HTTPConnection("127.0.0.1", server.port, timeout=JOB_TIMEOUT)
    digest, size = hashlib.sha256(), 0
    start = time.perf_counter()
    try:
        conn.request("GET", "/v1/models/%s/document" % model_id)
        r = conn.getresponse()
        if r.status != 200:
            raise RuntimeError("document answered %d: %s" % (r.status, r.read()[:400]))
        while True:
            chunk = r.read(1 << 20)
            if not chunk:
                break
            digest.update(chunk)
            size += len(chunk)
        chunked = (r.getheader("Transfer-Encoding") or "").lower() == "chunked"
    finally:
        conn.close()
        done.set()
        sampler.join()
    seconds = time.perf_counter() - start
    if digest.hexdigest()[:32] != model_id:
        raise RuntimeError("the served document does not hash to the model id")
    return {"served_document_bytes": size, "served_document_seconds": seconds,
            "served_document_chunked": chunked,
            "served_document_max_rss_bytes": max(samples) if samples else None}


def measure(args, document, workdir):
    server = Server(args.mdpserve, workdir, max(os.path.getsize(document) + (1 << 20), 1 << 20),
                    args.store == "memory")
    try:
        idle = settle(server.proc.pid, 0.5)
        start = time.perf_counter()
        with open(document, "rb") as f:
            status, body = server.request("POST", "/v1/models", f, os.path.getsize(document))
        upload_seconds = time.perf_counter() - start
        if status not in (200, 201):
            problem = json.loads(body) if body.startswith(b"{") else {}
            raise UploadRefused({"upload_status": status, "upload_seconds": upload_seconds,
                                 "upload_detail": problem.get("detail", body[:400].decode()),
                                 "idle_rss_bytes": idle["VmRSS"],
                                 "peak_rss_bytes": proc_status(server.proc.pid)["VmHWM"]})
        model_id = json.loads(body)["id"]
        uploaded = settle(server.proc.pid)
        options = {"method": "value_iteration", "tolerance": args.tolerance}
        start = time.perf_counter()
        status, body = server.request("POST", "/v1/jobs", json.dumps(
            {"model_id": model_id, "options": options}).encode())
        if status != 202:
            raise RuntimeError("solve answered %d: %s" % (status, body[:400]))
        job_id = json.loads(body)["id"]
        deadline = time.monotonic() + JOB_TIMEOUT
        while True:
            status, body = server.request("GET", "/v1/jobs/" + job_id)
            view = json.loads(body)
            if view.get("status") in ("succeeded", "failed", "cancelled"):
                break
            if time.monotonic() > deadline:
                raise RuntimeError("the solve did not finish in time")
            time.sleep(0.2)
        solve_seconds = time.perf_counter() - start
        if view["status"] != "succeeded":
            raise RuntimeError("the solve ended %s: %s" % (view["status"], view.get("error")))
        solved = settle(server.proc.pid)
        status, body = server.request("GET", "/metrics")
        metrics = body.decode()
        document_step = fetch_document(server, model_id)
        return {
            **document_step,
            "idle_rss_bytes": idle["VmRSS"],
            "uploaded_rss_bytes": uploaded["VmRSS"],
            "solved_rss_bytes": solved["VmRSS"],
            "peak_rss_bytes": solved["VmHWM"],
            "upload_seconds": upload_seconds, "solve_seconds": solve_seconds,
            "cached_model_bytes": gauge(metrics, "mdpserve_cached_model_bytes"),
            "cached_solution_bytes": gauge(metrics, "mdpserve_cached_solution_bytes"),
        }
    finally:
        server.stop()


def main():
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--mdpserve")
    ap.add_argument("--states", type=int, default=1_000_000)
    ap.add_argument("--actions", type=int, default=4)
    ap.add_argument("--outcomes", type=int, default=8)
    ap.add_argument("--seed", type=int, default=1)
    ap.add_argument("--document", help="an arrays document written by --write-only")
    ap.add_argument("--write-only", metavar="FILE", help="write the model document and stop")
    ap.add_argument("--tolerance", type=float, default=1e-2)
    ap.add_argument("--keep-document", action="store_true")
    ap.add_argument("--store", choices=["sqlite", "memory"], default="sqlite",
                    help="the server's store: embedded SQLite in the temporary directory "
                         "(default) or --memory-store")
    args = ap.parse_args()

    if args.write_only:
        start = time.perf_counter()
        write_arrays_model(args.write_only, args.states, args.actions, args.outcomes, args.seed)
        print("wrote %s (%.0f MB) in %.1f s" % (args.write_only,
              os.path.getsize(args.write_only) / 1e6, time.perf_counter() - start),
              file=sys.stderr)
        return
    if not args.mdpserve:
        ap.error("--mdpserve is required unless --write-only")
    workdir = tempfile.mkdtemp(prefix="mdp-memory.")
    try:
        document = args.document or os.path.join(workdir, "model-arrays.json")
        if not args.document:
            write_arrays_model(document, args.states, args.actions, args.outcomes, args.seed)
        rows = args.states * args.actions
        outcomes = rows * args.outcomes
        raw = raw_bytes(args.states, rows, outcomes)
        raw_total = sum(raw.values())
        common = {
            "kind": "service_memory", "store": args.store, "states": args.states,
            "actions": args.actions, "outcomes": args.outcomes, "rows": rows,
            "outcome_count": outcomes, "document_bytes": os.path.getsize(document),
            "raw_bytes": raw, "raw_total_bytes": raw_total, "target_ratio": TARGET_RATIO,
            "tolerance": args.tolerance,
        }
        try:
            result = measure(args, document, workdir)
        except UploadRefused as refused:  # A result too: the service cannot hold the model.
            print(json.dumps({**common, **refused.args[0]}))
            return
        result.update(common)
        result.update({
            "upload_status": 201,
            "rss_ratio": result["solved_rss_bytes"] / raw_total,
            "held_ratio": (result["solved_rss_bytes"] - result["idle_rss_bytes"]) / raw_total,
        })
        print(json.dumps(result))
    finally:
        if args.keep_document and not args.document:
            print("service_memory: kept %s" % workdir, file=sys.stderr)
        else:
            shutil.rmtree(workdir, ignore_errors=True)


if __name__ == "__main__":
    main()
