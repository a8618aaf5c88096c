#!/usr/bin/python3
"""Model ingest: wall time of `mdpserve validate DOC` (read, parse, validate, compile) against
Python's json.load of the same file, alternating, each in a fresh process so both start cold
in memory and the peak resident memory of each is its own. Prints one JSON object.

json.load's time is measured inside its process (interpreter start-up excluded); mdpserve's
is the whole process, start-up included, so the ratio errs in Python's favour.

    /usr/bin/python3 scripts/bench/ingest_bench.py --mdpserve BIN --document DOC
        [--encoding objects] [--repetitions 3]
"""
import argparse
import json
import os
import subprocess
import sys
import time

JSON_LOAD = """
import json, resource, sys, time
start = time.perf_counter()
with open(sys.argv[1], "rb") as f:
    json.load(f)
print(time.perf_counter() - start)
"""


def run(argv):
    """Runs argv with stdout captured; returns (wall seconds, peak RSS bytes, stdout)."""
    start = time.perf_counter()
    child = subprocess.Popen(argv, stdout=subprocess.PIPE, stderr=subprocess.DEVNULL)
    out = child.stdout.read()
    _, status, usage = os.wait4(child.pid, 0)
    wall = time.perf_counter() - start
    child.returncode = os.waitstatus_to_exitcode(status)
    if child.returncode != 0:
        sys.exit(f"ingest_bench: {' '.join(argv)} exited {child.returncode}")
    return wall, usage.ru_maxrss * 1024, out


def main():
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--mdpserve", required=True)
    ap.add_argument("--document", required=True)
    ap.add_argument("--encoding", default="objects",
                    help="label of the document's encoding (a column in BENCHMARKS.md)")
    ap.add_argument("--repetitions", type=int, default=3)
    args = ap.parse_args()

    validate, load = [], []
    for _ in range(args.repetitions):
        wall, rss, out = run([args.mdpserve, "validate", args.document])
        issues = json.loads(out)
        if issues.get("errors"):
            sys.exit(f"ingest_bench: the document has errors: {issues['errors'][:3]}")
        validate.append((wall, rss))
        wall, rss, out = run([sys.executable, "-c", JSON_LOAD, args.document])
        load.append((float(out), rss, wall))
    print(json.dumps({
        "kind": "ingest", "encoding": args.encoding, "document": args.document,
        "bytes": os.path.getsize(args.document), "repetitions": args.repetitions,
        "validate_seconds": min(v[0] for v in validate),
        "validate_peak_rss_bytes": max(v[1] for v in validate),
        "json_load_seconds": min(v[0] for v in load),
        "json_load_process_seconds": min(v[2] for v in load),
        "json_load_peak_rss_bytes": max(v[1] for v in load),
    }))


if __name__ == "__main__":
    main()
