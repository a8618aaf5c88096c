#!/usr/bin/python3
"""Independent average-reward reference: the optimal gain of a unichain MDP by linear programming.

Used by tests/solver/average_reward_test.cc, which writes a model to a text file, runs
    /usr/bin/python3 tests/reference/average_lp_check.py FILE
and compares the printed gain with the mdpserve solvers. The LP is solved by
scipy.optimize.linprog(method="highs") (the HiGHS solver shipped with SciPy), which shares no
code with mdpserve.

File format (plain text, whitespace separated, '#' starts a comment line):
    average-reward-model <states> <rows> <maximize|minimize>
    then <rows> lines, one per (state, action):
    <state> <expected reward> <k> <next_1> <probability_1> ... <next_k> <probability_k>
States are 0-based. A state without rows is terminal: absorbing with reward 0 per step.

The LP (unichain models; the gain g is then the same in every state). Maximise:
    minimise g  subject to  g + h(s) - sum_s' p(s'|s, a) h(s') >= r(s, a)  for every row,
with g and h free (h(0) is fixed to 0, which removes only the additive-constant freedom of h).
Minimise: maximise g subject to the same constraints with <=. Its optimal value is the
optimal gain (Puterman 1994, Markov Decision Processes, sec. 8.8, from memory).

Before printing, the LP answer is certified without trusting the LP solver: the primal (g, h)
must satisfy every constraint, and the dual variables x(s, a) >= 0 taken from HiGHS must be a
state-action frequency (sum x = 1, and for every state j: sum_a x(j, a) =
sum_{s, a} x(s, a) p(j|s, a)) whose average reward sum x r equals g. Primal and dual feasibility
with equal objectives prove optimality.

Output: one line "gain <value>"; exit 0. Exit 2 (message on stderr) if the LP fails or the
certificate does not hold; exit 3 if numpy/scipy are missing.
"""

import sys

try:
    import numpy as np
    import scipy.sparse as sp
    from scipy.optimize import linprog
except ImportError as error:  # pragma: no cover - environment check
    print(f"scipy unavailable: {error}", file=sys.stderr)
    sys.exit(3)

FEASIBILITY_TOL = 1e-8
OBJECTIVE_TOL = 1e-8


def read_model(path):
    with open(path, encoding="utf-8") as f:
        lines = [ln.split() for ln in f if ln.strip() and not ln.lstrip().startswith("#")]
    head = lines[0]
    if head[0] != "average-reward-model" or head[3] not in ("maximize", "minimize"):
        raise ValueError("bad header: " + " ".join(head))
    n, n_rows, objective = int(head[1]), int(head[2]), head[3]
    rows = []
    for fields in lines[1:1 + n_rows]:
        s, r, k = int(fields[0]), float(fields[1]), int(fields[2])
        outs = [(int(fields[3 + 2 * i]), float(fields[4 + 2 * i])) for i in range(k)]
        rows.append((s, r, outs))
    has_row = {s for s, _, _ in rows}
    for s in range(n):
        if s not in has_row:
            rows.append((s, 0.0, [(s, 1.0)]))  # Terminal: absorbing, reward 0.
    return n, rows, objective


def solve(n, rows, objective):
    sign = 1.0 if objective == "maximize" else -1.0
    # Variables: x = (g, h_0, ..., h_{n-1}). Constraint per row, written as A_ub x <= b_ub:
    # maximise: -(g + h(s) - P h) <= -r;  minimise: (g + h(s) - P h) <= r.
    data, ri, ci = [], [], []
    b = np.empty(len(rows))
    for i, (s, r, outs) in enumerate(rows):
        coef = {0: 1.0}
        coef[1 + s] = coef.get(1 + s, 0.0) + 1.0
        for t, p in outs:
            coef[1 + t] = coef.get(1 + t, 0.0) - p
        for j, c in coef.items():
            if c != 0.0:
                ri.append(i)
                ci.append(j)
                data.append(-sign * c)
        b[i] = -sign * r
    a_ub = sp.csr_matrix((data, (ri, ci)), shape=(len(rows), n + 1))
    c = np.zeros(n + 1)
    c[0] = sign  # Minimise g (maximise) or -g (minimise).
    bounds = [(None, None)] + [(0.0, 0.0)] + [(None, None)] * (n - 1)
    # HiGHS's default feasibility tolerances (1e-7) left a certificate of the slowly mixing
    # rings of average_reward_test.cc with dual frequencies down to -7e-8.
    res = linprog(c, A_ub=a_ub, b_ub=b, bounds=bounds, method="highs",
                  options={"primal_feasibility_tolerance": 1e-10,
                           "dual_feasibility_tolerance": 1e-10})
    if res.status != 0:
        raise RuntimeError(f"linprog failed: status {res.status}: {res.message}")
    g = res.x[0]
    h = res.x[1:]

    # Certificate. Primal feasibility.
    lhs = np.array([g + h[s] - sum(p * h[t] for t, p in outs) for s, _, outs in rows])
    rew = np.array([r for _, r, _ in rows])
    violation = np.max(sign * (rew - lhs))
    if violation > FEASIBILITY_TOL:
        raise RuntimeError(f"LP answer violates a constraint by {violation}")
    # Dual feasibility: x >= 0, sum x = 1, balance at every state.
    x = -np.asarray(res.ineqlin.marginals)
    if np.min(x) < -FEASIBILITY_TOL:
        raise RuntimeError(f"dual has a negative frequency {np.min(x)}")
    if abs(np.sum(x) - 1.0) > FEASIBILITY_TOL:
        raise RuntimeError(f"dual frequencies sum to {np.sum(x)}")
    inflow = np.zeros(n)
    outflow = np.zeros(n)
    for xi, (s, _, outs) in zip(x, rows):
        outflow[s] += xi
        for t, p in outs:
            inflow[t] += xi * p
    if np.max(np.abs(inflow - outflow)) > FEASIBILITY_TOL:
        raise RuntimeError("dual frequencies are not balanced")
    dual_gain = float(np.dot(x, rew))
    if abs(dual_gain - g) > OBJECTIVE_TOL * max(1.0, abs(g)):
        raise RuntimeError(f"primal gain {g} and dual gain {dual_gain} differ")
    return g


def main():
    if len(sys.argv) != 2:
        print(__doc__, file=sys.stderr)
        return 2
    try:
        g = solve(*read_model(sys.argv[1]))
    except (OSError, ValueError, RuntimeError) as error:
        print(f"average_lp_check: {error}", file=sys.stderr)
        return 2
    print(f"gain {g!r}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
