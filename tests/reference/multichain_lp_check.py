#!/usr/bin/python3
"""Independent multichain reference: the optimal gain of every state of an MDP, by linear programming.

Used by tests/solver/average_reward_test.cc, which writes a model to a text file, runs
    /usr/bin/python3 tests/reference/multichain_lp_check.py FILE
and compares the printed per-state gains with mdpserve's policy iteration. The LP is solved
by scipy.optimize.linprog(method="highs") (the HiGHS solver shipped with SciPy), which shares
no code with mdpserve.

File format: as tests/reference/average_lp_check.py (its docstring), i.e.
    average-reward-model <states> <rows> <maximize|minimize>
    then one line per (state, action):
    <state> <expected reward> <k> <next_1> <probability_1> ... <next_k> <probability_k>
A state without rows is terminal: absorbing with reward 0 per step.

The LP (maximise; a minimise model is solved as the maximise model with negated rewards, and
its gains negated back). With weights alpha(j) = 1 / states:
    minimise sum_j alpha(j) g(j)  subject to, for every row (s, a),
        g(s) >= sum_j p(j|s, a) g(j)                                  (A)
        g(s) + h(s) >= r(s, a) + sum_j p(j|s, a) h(j)                 (B)
with g and h free. Every feasible g is >= the optimal gain g* in every state (for any
deterministic stationary policy d, (A) gives g >= P*_d g and (B) gives P*_d g >= P*_d r_d =
g^d, P*_d the limiting matrix), and (g*, h + M g*) is feasible for a bias h of the
multichain optimality equations and M large, so the optimum has g = g* in every state
(Puterman 1994, Markov Decision Processes, sec. 9.3, from memory).

Before printing, the LP answer is checked without trusting the LP solver: the primal (g, h)
must satisfy every constraint, the multipliers HiGHS reports must be dual feasible (all
>= 0, and A^T mu = -c for the constraint matrix A and objective c), and the primal and dual
objectives must agree. Feasible primal and dual with equal objectives prove optimality of
the objective; since every feasible g is >= g* and the weights are positive, g = g* follows.

Output: one line "gains <g_0> ... <g_{n-1}>"; exit 0. Exit 2 (message on stderr) if the LP
fails or a check does not hold; exit 3 if numpy/scipy are missing.
"""

import sys

try:
    import numpy as np
    import scipy.sparse as sp
    from scipy.optimize import linprog
except ImportError as error:  # pragma: no cover - environment check
    print(f"scipy unavailable: {error}", file=sys.stderr)
    sys.exit(3)

FEASIBILITY_TOL = 1e-9
OBJECTIVE_TOL = 1e-9


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
    if len(rows) != n_rows:
        raise ValueError(f"expected {n_rows} rows, found {len(rows)}")
    has_row = {s for s, _, _ in rows}
    for s in range(n):
        if s not in has_row:
            rows.append((s, 0.0, [(s, 1.0)]))  # Terminal: absorbing, reward 0.
    return n, rows, objective


def constraint_matrix(n, rows, sign):
    """A_ub z <= b_ub for z = (g_0..g_{n-1}, h_0..h_{n-1}): rows (A) first, then (B)."""
    data, ri, ci = [], [], []
    b = np.zeros(2 * len(rows))

    def add(i, j, c):
        data.append(c)
        ri.append(i)
        ci.append(j)

    for i, (s, r, outs) in enumerate(rows):
        # (A): -g(s) + sum p g <= 0.
        add(i, s, -1.0)
        for t, p in outs:
            add(i, t, p)
        # (B): -g(s) - h(s) + sum p h <= -sign r.
        k = len(rows) + i
        add(k, s, -1.0)
        add(k, n + s, -1.0)
        for t, p in outs:
            add(k, n + t, p)
        b[k] = -sign * r
    # Duplicate (i, j) pairs are summed by the sparse constructor.
    a = sp.csr_matrix((data, (ri, ci)), shape=(2 * len(rows), 2 * n))
    return a, b


def solve(n, rows, objective):
    sign = 1.0 if objective == "maximize" else -1.0
    a_ub, b_ub = constraint_matrix(n, rows, sign)
    c = np.concatenate([np.full(n, 1.0 / n), np.zeros(n)])
    res = linprog(c, A_ub=a_ub, b_ub=b_ub, bounds=[(None, None)] * (2 * n), method="highs")
    if res.status != 0:
        raise RuntimeError(f"linprog failed: status {res.status}: {res.message}")
    z = res.x
    scale = max(1.0, float(np.max(np.abs(z))))

    # Primal feasibility (relative to the size of the solution, as HiGHS works).
    violation = float(np.max(a_ub @ z - b_ub))
    if violation > FEASIBILITY_TOL * scale:
        raise RuntimeError(f"LP answer violates a constraint by {violation}")
    # Dual feasibility: mu = -marginals >= 0 and A^T mu = -c.
    mu = -np.asarray(res.ineqlin.marginals)
    if np.min(mu) < -FEASIBILITY_TOL:
        raise RuntimeError(f"dual has a negative multiplier {np.min(mu)}")
    stationarity = float(np.max(np.abs(a_ub.T @ mu + c)))
    if stationarity > FEASIBILITY_TOL:
        raise RuntimeError(f"dual is not stationary: {stationarity}")
    primal = float(c @ z)
    dual = float(-b_ub @ mu)
    if abs(primal - dual) > OBJECTIVE_TOL * max(1.0, abs(primal)):
        raise RuntimeError(f"primal objective {primal} and dual objective {dual} differ")
    return sign * z[:n]


def main():
    if len(sys.argv) != 2:
        print(__doc__, file=sys.stderr)
        return 2
    try:
        g = solve(*read_model(sys.argv[1]))
    except (OSError, ValueError, RuntimeError) as error:
        print(f"multichain_lp_check: {error}", file=sys.stderr)
        return 2
    print("gains " + " ".join(repr(float(x)) for x in g))
    return 0


if __name__ == "__main__":
    sys.exit(main())
