#!/usr/bin/python3
"""The numpy/scipy baseline: the value-iteration sweep a user would write with scipy.sparse,
run on the very model solver_bench wrote (solver_bench model --write-arrays=DIR).

One sweep is  Q = r + g * (P @ V)  (CSR matvec over all state-action rows) followed by
V' = max over each state's rows (np.maximum.reduceat). Prints one JSON object:
seconds per sweep (best and median), the largest difference from the solver's own values
after the same number of sweeps (a check that both compute the same thing), and with
--solve the time and sweeps value iteration takes to the same error bound as the solver's
(stop when g e / (1 - g) <= tolerance, e = sup |V' - V|; Puterman 1994, Thm 6.3.1).

    /usr/bin/python3 scripts/bench/baseline_sweep.py DIR [--sweeps 10] [--min-seconds 0.5]
        [--solve]
        [--tolerance 1e-6] [--time-limit 1800]
"""
import argparse
import json
import os
import resource
import sys
import time

import numpy as np
import scipy
import scipy.sparse


def load(directory):
    """Returns (P, reward, starts, meta) for the arrays in `directory`."""
    meta = json.load(open(os.path.join(directory, "meta.json")))
    arrays = {name: np.load(os.path.join(directory, name + ".npy"))
              for name in ("state_row_begin", "row_reward", "row_entry_begin", "entry_next",
                           "entry_probability")}
    p = scipy.sparse.csr_matrix(
        (arrays["entry_probability"], arrays["entry_next"], arrays["row_entry_begin"]),
        shape=(meta["rows"], meta["states"]))
    starts = arrays["state_row_begin"][:-1]
    if meta["rows"] and np.any(np.diff(arrays["state_row_begin"]) == 0):
        sys.exit("baseline_sweep: every state needs a row (no terminal states)")
    return p, arrays["row_reward"], starts, meta


def make_sweep(p, reward, starts, discount, maximize):
    best = np.maximum if maximize else np.minimum

    def sweep(v):
        q = reward + discount * (p @ v)
        return best.reduceat(q, starts)
    return sweep


def time_sweeps(sweep, states, repetitions, min_seconds):
    """As solver_bench: two untimed sweeps, then at least `repetitions` and, up to 10x that
    many, until `min_seconds` have passed."""
    v = np.zeros(states)
    for _ in range(2):
        v = sweep(v)
    seconds, begin = [], time.perf_counter()
    while len(seconds) < repetitions or (time.perf_counter() - begin < min_seconds
                                         and len(seconds) < 10 * repetitions):
        start = time.perf_counter()
        v = sweep(v)
        seconds.append(time.perf_counter() - start)
    seconds.sort()
    return {"best_seconds": seconds[0], "median_seconds": seconds[len(seconds) // 2],
            "repetitions": len(seconds)}


def solve(sweep, states, discount, tolerance, time_limit):
    target = tolerance * (1 - discount) / discount
    v = np.zeros(states)
    start = time.perf_counter()
    sweeps, e, outcome = 0, float("inf"), "converged"
    while e > target:
        nv = sweep(v)
        e = float(np.max(np.abs(nv - v)))
        v = nv
        sweeps += 1
        if time.perf_counter() - start > time_limit:
            outcome = "time_limit"
            break
    return {"method": "value_iteration", "outcome": outcome, "sweeps": sweeps,
            "solve_seconds": time.perf_counter() - start,
            "value_error_bound": discount * e / (1 - discount)}


def main():
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("directory")
    ap.add_argument("--sweeps", type=int, default=10)
    ap.add_argument("--min-seconds", type=float, default=0.5)
    ap.add_argument("--solve", action="store_true")
    ap.add_argument("--tolerance", type=float, default=1e-6)
    ap.add_argument("--time-limit", type=float, default=1800)
    args = ap.parse_args()

    start = time.perf_counter()
    p, reward, starts, meta = load(args.directory)
    load_seconds = time.perf_counter() - start
    g = meta["discount"]
    sweep = make_sweep(p, reward, starts, g, meta["maximize"])

    v = np.zeros(meta["states"])
    for _ in range(meta["check_sweeps"]):
        v = sweep(v)
    expected = np.load(os.path.join(args.directory, "check_values.npy"))
    report = {"kind": "numpy", "directory": args.directory, "states": meta["states"],
              "rows": meta["rows"], "entries": meta["entries"], "load_seconds": load_seconds,
              "numpy": np.__version__, "scipy": scipy.__version__,
              "index_dtype": str(p.indices.dtype),
              "check_max_diff": float(np.max(np.abs(v - expected))) if len(v) else 0.0}
    if args.sweeps > 0:
        report["sweep"] = time_sweeps(sweep, meta["states"], args.sweeps, args.min_seconds)
    if args.solve:
        report["solve"] = solve(sweep, meta["states"], g, args.tolerance, args.time_limit)
        report["tolerance"] = args.tolerance
    report["peak_rss_bytes"] = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * 1024
    print(json.dumps(report))


if __name__ == "__main__":
    main()
