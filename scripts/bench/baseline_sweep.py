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
        [--paired-solver "build/bin/solver_bench sweep-on-request --structure=random ..."]
        [--paired-rounds 15] [--paired-sweeps 2]

With --paired-solver, last: starts that command (the same model, generated again by the
solver's own process), checks it holds the same model (the sum of V after the check sweeps),
and times numpy's sweep and the solver's in alternation, --paired-rounds rounds per solver
thread count (1 and all), each side's best of --paired-sweeps sweeps per round: the list
"paired_solver", with the per-round ratios numpy / solver. Timing both in the same minutes
matters on a shared machine, where either side's speed moves by tens of percent between
runs made minutes apart.
"""
import argparse
import json
import os
import resource
import shlex
import subprocess
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


def paired_with_solver(command, sweep, states, check_sum, rounds, per_round):
    """Alternates numpy's sweep with the solver's (solver_bench sweep-on-request)."""
    solver = subprocess.Popen(shlex.split(command), stdin=subprocess.PIPE,
                              stdout=subprocess.PIPE, text=True)
    try:
        ready = json.loads(solver.stdout.readline() or "null")
        if not ready or not ready.get("ready"):
            sys.exit("baseline_sweep: the paired solver did not start")
        if ready["states"] != states or not np.isclose(ready["check_sum"], check_sum,
                                                       rtol=1e-7, atol=1e-9):
            sys.exit(f"baseline_sweep: the paired solver holds another model ({ready}, "
                     f"numpy's check sum {check_sum})")

        def solver_sweeps(threads):
            solver.stdin.write(f"{threads} {per_round}\n")
            solver.stdin.flush()
            return json.loads(solver.stdout.readline())

        out = []
        for threads in (1, 0):
            v = np.zeros(states)
            used = solver_sweeps(threads)["threads"]  # Warms both sides up.
            v = sweep(sweep(v))
            numpy_best, solver_best, ratios = [], [], []
            for _ in range(rounds):
                times = []
                for _ in range(per_round):
                    start = time.perf_counter()
                    v = sweep(v)
                    times.append(time.perf_counter() - start)
                numpy_best.append(min(times))
                solver_best.append(min(solver_sweeps(threads)["seconds"]))
                ratios.append(numpy_best[-1] / solver_best[-1])
            ratios.sort()
            out.append({"threads": used, "rounds": rounds, "sweeps_per_round": per_round,
                        "numpy_median_seconds": float(np.median(numpy_best)),
                        "numpy_best_seconds": min(numpy_best),
                        "solver_median_seconds": float(np.median(solver_best)),
                        "solver_best_seconds": min(solver_best),
                        "ratio_min": ratios[0], "ratio_median": ratios[len(ratios) // 2],
                        "ratio_max": ratios[-1]})
            if used == 1 and threads == 0:
                break
        solver.stdin.write("quit\n")
        solver.stdin.flush()
        if solver.wait(timeout=60) != 0:
            sys.exit("baseline_sweep: the paired solver failed")
        return out
    finally:
        if solver.poll() is None:
            solver.kill()
            solver.wait()


def main():
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("directory")
    ap.add_argument("--sweeps", type=int, default=10)
    ap.add_argument("--min-seconds", type=float, default=0.5)
    ap.add_argument("--solve", action="store_true")
    ap.add_argument("--tolerance", type=float, default=1e-6)
    ap.add_argument("--time-limit", type=float, default=1800)
    ap.add_argument("--paired-solver", default="")
    ap.add_argument("--paired-rounds", type=int, default=15)
    ap.add_argument("--paired-sweeps", type=int, default=2)
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
    if args.paired_solver and args.paired_rounds > 0:
        report["paired_solver"] = paired_with_solver(
            args.paired_solver, sweep, meta["states"], float(np.sum(v)), args.paired_rounds,
            max(1, args.paired_sweeps))
    print(json.dumps(report))


if __name__ == "__main__":
    main()
