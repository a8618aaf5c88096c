#!/usr/bin/python3
"""Independent linear-programming reference check for the mdpserve solver.

What it checks
--------------
This script generates seeded random MDP model documents (format ``mdpserve/model@1``), solves
each one *independently* as a linear program with ``scipy.optimize.linprog(method="highs")``
(the HiGHS LP solver shipped with SciPy, which shares no code with mdpserve), and compares the
output of the mdpserve CLI against that reference:

* ``mdpserve solve MODEL --method M --tolerance 1e-9 --out FILE`` for every method
  (value_iteration, gauss_seidel, policy_iteration, modified_policy_iteration):
  - the optimal values must match the LP values within max(1e-6, 1e-9 * max|V|);
  - the chosen action of every non-terminal state must attain the optimum of the Q-table
    computed from the LP values (Q(s, a) = r(s, a) + g * sum p(s'|s, a) V_lp(s')) within that
    same tolerance; chosen actions outside the strict LP-optimal set (constraint tight within
    max(1e-7, 1e-10 * max|V|)) are reported as near-ties;
  - the per-state detail (``states``) must carry a Q-table matching the LP Q-table, an
    ``optimal_actions`` set that contains the chosen action and every strictly LP-optimal action.
* ``mdpserve evaluate MODEL --policy FILE`` for a random deterministic policy and a random
  stochastic policy: V^pi must match a dense ``numpy.linalg.solve`` of (I - g P_pi) V = r_pi
  within max(1e-8, 1e-11 * max|V|).

The LP: for a maximising model, minimise sum_s V(s) subject to
V(s) >= r(s, a) + g * sum_s' p(s'|s, a) V(s') for every state action; for a minimising model,
maximise sum_s V(s) subject to V(s) <= c(s, a) + g * sum_s' p(s'|s, a) V(s'). Terminal states have
their bounds fixed to 0. r(s, a) is the state-action ``reward`` plus sum(probability * outcome
reward); the same next state may appear in several outcomes of one state action. Constraint
matrices are scipy.sparse. Each LP solution is itself checked (status optimal, small Bellman
residual) before it is used as the reference.

Usage:
    /usr/bin/python3 tests/reference/lp_reference_check.py --mdpserve PATH [--seeds N]

Prints one line per check and finally ``N passed, M failed``; exits 1 if any check failed.
"""

import argparse
import json
import math
import os
import subprocess
import sys
import tempfile
import time

import numpy as np
import scipy.sparse as sp
from scipy.optimize import linprog

METHODS = ("value_iteration", "gauss_seidel", "policy_iteration", "modified_policy_iteration")
SOLVE_TOLERANCE = "1e-9"
CLI_TIMEOUT_SECONDS = 300

# Comparison tolerances (absolute, with a relative floor for large value scales).
VALUE_ABS_TOL = 1e-6
VALUE_REL_TOL = 1e-9
TIGHT_ABS_TOL = 1e-7
TIGHT_REL_TOL = 1e-10
EVAL_ABS_TOL = 1e-8
EVAL_REL_TOL = 1e-11
# The LP reference must itself satisfy the Bellman equation this closely before it is trusted.
LP_RESIDUAL_ABS_TOL = 1e-8
LP_RESIDUAL_REL_TOL = 1e-11

ACTION_CATALOGUE = ("advance", "wait", "repair", "sell", "hold", "reroute", "inspect", "expand")

# (number of states, discount, objective, reward scale) for the first models; later seeds draw
# these at random. The schedule guarantees coverage of sizes 5..300, every discount in
# {0.0, 0.5, 0.9, 0.95, 0.99} and both objectives with the default 8 seeds.
SCHEDULE = (
    (5, 0.9, "maximize", 1.0),
    (300, 0.99, "minimize", 10.0),
    (12, 0.0, "minimize", 1.0),
    (150, 0.95, "maximize", 1000.0),
    (40, 0.5, "maximize", 10.0),
    (220, 0.99, "maximize", 1.0),
    (80, 0.95, "minimize", 1000.0),
    (25, 0.0, "maximize", 10.0),
)
DISCOUNTS = (0.0, 0.5, 0.9, 0.95, 0.99)


# ----------------------------------------------------------------------------------------------
# Model generation
# ----------------------------------------------------------------------------------------------

def normalised_probabilities(rng, m):
    """Dirichlet(1,...,1) probabilities as floats summing to 1 within 1e-12."""
    p = rng.dirichlet(np.ones(m))
    p = p / p.sum()
    probs = [float(x) for x in p]
    if abs(math.fsum(probs) - 1.0) > 1e-13:
        probs[-1] = 1.0 - math.fsum(probs[:-1])
    return probs


def state_names(n, seed):
    """Plain names for most models; a few models use spaces and non-ASCII characters."""
    if seed % 3 == 2:
        return ["état %d · zone %s" % (i, "ABCDEFG"[i % 7]) for i in range(n)]
    return ["s%04d" % i for i in range(n)]


# Models above 3000 states, where policy iteration evaluates iteratively (inexactly) rather
# than by sparse LU: (seed, number of states, discount, objective, reward scale).
LARGE_MODELS = (
    (100, 3600, 0.99, "maximize", 10.0),
    (101, 3300, 0.95, "minimize", 1.0),
)


def random_model(seed, shape=None):
    """Build a random mdpserve/model@1 document from numpy.random.default_rng(seed); `shape`
    (states, discount, objective, scale) overrides the schedule."""
    rng = np.random.default_rng(seed)
    if shape is not None:
        n, discount, objective, scale = shape
    elif seed < len(SCHEDULE):
        n, discount, objective, scale = SCHEDULE[seed]
    else:
        n = int(rng.integers(5, 301))
        discount = float(rng.choice(DISCOUNTS))
        objective = "maximize" if rng.random() < 0.5 else "minimize"
        scale = float(rng.choice([1.0, 10.0, 1000.0]))

    names = state_names(n, seed)
    # Some terminal states, never state 0, never all states.
    n_terminal = int(rng.integers(0, max(1, n // 5) + 1))
    n_terminal = min(n_terminal, n - 1)
    terminal = set(int(i) for i in rng.choice(np.arange(1, n), size=n_terminal, replace=False)) \
        if n_terminal > 0 else set()

    states = []
    forced_duplicate = False
    forced_tie = False
    for i in range(n):
        if i in terminal:
            entry = {"name": names[i], "terminal": True}
            if rng.random() < 0.5:
                entry["actions"] = []
            states.append(entry)
            continue
        k = int(rng.integers(1, 6))
        chosen = [str(a) for a in rng.choice(ACTION_CATALOGUE, size=k, replace=False)]
        actions = []
        for a in chosen:
            # The same next state twice with different rewards: forced in the first state action
            # of every model, and at random elsewhere. One outcome is split in two, so draw at
            # most 7 distinct next states then, keeping 1..8 outcomes per state action.
            duplicate = not forced_duplicate or rng.random() < 0.1
            m = min(int(rng.integers(1, 8 if duplicate else 9)), n)
            nexts = [int(j) for j in rng.choice(n, size=m, replace=False)]
            probs = normalised_probabilities(rng, m)
            outcomes = []
            for j, p in zip(nexts, probs):
                o = {"next": names[j], "probability": p}
                if rng.random() < 0.7:
                    o["reward"] = float(rng.uniform(-0.5, 1.0) * scale)
                outcomes.append(o)
            if duplicate:
                forced_duplicate = True
                t = int(rng.integers(0, len(outcomes)))
                base = outcomes[t]
                split = float(rng.uniform(0.2, 0.8))
                p_first = base["probability"] * split
                p_second = base["probability"] - p_first
                r_first = float(rng.uniform(-0.5, 1.0) * scale)
                r_second = r_first + float(rng.uniform(0.1, 1.0) * scale)
                base["probability"] = p_first
                base["reward"] = r_first
                outcomes.insert(t + 1, {"next": base["next"], "probability": p_second,
                                        "reward": r_second})
            sa = {"action": a, "outcomes": outcomes}
            if rng.random() < 0.3:
                sa["reward"] = float(rng.uniform(-0.5, 1.0) * scale)
            actions.append(sa)
        # Engineered exact ties: a second action with identical dynamics and rewards.
        if len(actions) >= 2 and (not forced_tie or rng.random() < 0.05):
            forced_tie = True
            copy = json.loads(json.dumps(actions[0]))
            copy["action"] = actions[1]["action"]
            actions[1] = copy
        states.append({"name": names[i], "actions": actions})

    for s in states:
        for sa in s.get("actions", []):
            total = math.fsum(o["probability"] for o in sa["outcomes"])
            assert abs(total - 1.0) <= 1e-12, (seed, s["name"], sa["action"], total)

    return {
        "format": "mdpserve/model@1",
        "name": "lp-reference random model seed %d" % seed,
        "description": "Random model generated by tests/reference/lp_reference_check.py",
        "reward_unit": "points",
        "objective": objective,
        "criterion": {"kind": "discounted", "discount": discount},
        "actions": list(ACTION_CATALOGUE),
        "states": states,
    }


def duplicate_next_model():
    """Small hand-made model with a closed-form answer; the same next state appears twice in one
    outcome list with different rewards. Used to validate the LP reference itself."""
    g = 0.9
    doc = {
        "format": "mdpserve/model@1",
        "name": "lp-reference duplicate next states",
        "objective": "maximize",
        "criterion": {"kind": "discounted", "discount": g},
        "actions": ["stay", "leave"],
        "states": [
            {"name": "loop", "actions": [
                # r = 0.5*10 + 0.5*0 = 5 per step, forever: V = 5 / (1 - g) = 50.
                {"action": "stay", "outcomes": [
                    {"next": "loop", "probability": 0.5, "reward": 10.0},
                    {"next": "loop", "probability": 0.5, "reward": 0.0}]},
                # r = 1 + 0.25*40 + 0.75*20 = 26, then terminal: V = 26 < 50.
                {"action": "leave", "reward": 1.0, "outcomes": [
                    {"next": "end", "probability": 0.25, "reward": 40.0},
                    {"next": "end", "probability": 0.75, "reward": 20.0}]}]},
            {"name": "start", "actions": [
                {"action": "leave", "outcomes": [
                    {"next": "loop", "probability": 0.4, "reward": -1.0},
                    {"next": "loop", "probability": 0.6, "reward": 1.0}]}]},
            {"name": "end", "terminal": True},
        ],
    }
    # start: r = 0.4*-1 + 0.6*1 = 0.2, V = 0.2 + 0.9*50 = 45.2
    expected = {"loop": 50.0, "start": 45.2, "end": 0.0}
    return doc, expected


# ----------------------------------------------------------------------------------------------
# Reference computations
# ----------------------------------------------------------------------------------------------

class Compiled:
    """Arrays derived from a model document: one row per (state, action)."""

    def __init__(self, doc):
        self.doc = doc
        self.names = [s["name"] for s in doc["states"]]
        self.index = {name: i for i, name in enumerate(self.names)}
        self.n = len(self.names)
        self.g = float(doc["criterion"]["discount"])
        self.maximize = doc["objective"] == "maximize"
        self.terminal = np.array([bool(s.get("terminal", False)) for s in doc["states"]])
        self.sa_state = []
        self.sa_action = []
        self.sa_reward = []
        self.rows_of_state = [[] for _ in range(self.n)]
        rows, cols, vals = [], [], []
        for i, s in enumerate(doc["states"]):
            for sa in s.get("actions", []) or []:
                row = len(self.sa_state)
                self.sa_state.append(i)
                self.sa_action.append(sa["action"])
                self.rows_of_state[i].append(row)
                r = float(sa.get("reward", 0.0))
                r += math.fsum(o["probability"] * float(o.get("reward", 0.0))
                               for o in sa["outcomes"])
                self.sa_reward.append(r)
                for o in sa["outcomes"]:
                    rows.append(row)
                    cols.append(self.index[o["next"]])
                    vals.append(float(o["probability"]))
        self.m = len(self.sa_state)
        self.sa_state = np.array(self.sa_state, dtype=np.int64)
        self.sa_reward = np.array(self.sa_reward)
        # Duplicate (row, col) entries are summed by the COO -> CSR conversion.
        self.P = sp.coo_matrix((vals, (rows, cols)), shape=(self.m, self.n)).tocsr()

    def q_table(self, v):
        return self.sa_reward + self.g * (self.P @ v)

    def backup(self, v):
        """Bellman optimality backup of v (terminal states map to 0)."""
        q = self.q_table(v)
        out = np.zeros(self.n)
        for i in range(self.n):
            rows = self.rows_of_state[i]
            if rows:
                out[i] = q[rows].max() if self.maximize else q[rows].min()
        return out

    def best(self, q, i):
        rows = self.rows_of_state[i]
        return q[rows].max() if self.maximize else q[rows].min()

    def gap(self, q, i, row):
        """How far the state action `row` is from the optimum of state i (>= 0)."""
        b = self.best(q, i)
        return (b - q[row]) if self.maximize else (q[row] - b)


def solve_lp(c):
    """Solve the MDP as an LP with HiGHS. Returns (values, status, message, seconds)."""
    t0 = time.perf_counter()
    n, m, g = c.n, c.m, c.g
    sel = sp.coo_matrix((np.ones(m), (np.arange(m), c.sa_state)), shape=(m, n)).tocsr()
    if c.maximize:
        # r + g P V - V(s) <= 0  <=>  (g P - E) V <= -r ; minimise sum V
        a_ub = (g * c.P - sel).tocsr()
        b_ub = -c.sa_reward
        cost = np.ones(n)
    else:
        # V(s) - g P V <= c ; maximise sum V
        a_ub = (sel - g * c.P).tocsr()
        b_ub = c.sa_reward.copy()
        cost = -np.ones(n)
    bounds = [(0.0, 0.0) if c.terminal[i] else (None, None) for i in range(n)]
    res = linprog(cost, A_ub=a_ub, b_ub=b_ub, bounds=bounds, method="highs",
                  options={"primal_feasibility_tolerance": 1e-10,
                           "dual_feasibility_tolerance": 1e-10})
    seconds = time.perf_counter() - t0
    v = np.array(res.x) if res.x is not None else None
    return v, res.status, res.message, seconds


def exact_policy_values(c, weights):
    """V^pi from a dense solve of (I - g P_pi) V = r_pi. weights: {row: prob}."""
    n = c.n
    p_pi = np.zeros((n, n))
    r_pi = np.zeros(n)
    dense_p = c.P.toarray()
    for row, w in weights.items():
        i = c.sa_state[row]
        p_pi[i] += w * dense_p[row]
        r_pi[i] += w * c.sa_reward[row]
    return np.linalg.solve(np.eye(n) - c.g * p_pi, r_pi)


def value_tol(v):
    return max(VALUE_ABS_TOL, VALUE_REL_TOL * float(np.max(np.abs(v), initial=0.0)))


def tight_tol(v):
    return max(TIGHT_ABS_TOL, TIGHT_REL_TOL * float(np.max(np.abs(v), initial=0.0)))


def eval_tol(v):
    return max(EVAL_ABS_TOL, EVAL_REL_TOL * float(np.max(np.abs(v), initial=0.0)))


# ----------------------------------------------------------------------------------------------
# Harness
# ----------------------------------------------------------------------------------------------

class Tally:
    def __init__(self):
        self.passed = 0
        self.failed = 0

    def report(self, ok, name, detail):
        if ok:
            self.passed += 1
        else:
            self.failed += 1
        print("%s  %s: %s" % ("PASS" if ok else "FAIL", name, detail), flush=True)


def write_json(path, doc):
    with open(path, "w", encoding="utf-8") as f:
        json.dump(doc, f, ensure_ascii=False, allow_nan=False)


def run_cli(args):
    """Run the CLI; returns (ok, stdout, problem)."""
    try:
        proc = subprocess.run(args, capture_output=True, timeout=CLI_TIMEOUT_SECONDS)
    except FileNotFoundError as e:
        return False, "", "cannot run: %s" % e
    except PermissionError as e:
        return False, "", "cannot run: %s" % e
    except subprocess.TimeoutExpired:
        return False, "", "timed out after %d s" % CLI_TIMEOUT_SECONDS
    stdout = proc.stdout.decode("utf-8", "replace")
    if proc.returncode != 0:
        stderr = proc.stderr.decode("utf-8", "replace").strip().splitlines()
        tail = " | ".join(stderr[-3:]) if stderr else "(no stderr)"
        return False, stdout, "exit status %d: %s" % (proc.returncode, tail)
    return True, stdout, ""


def read_value_map(c, doc_values, what):
    """Map {state: V} to an array; terminal states may be omitted (0). Returns (array, problems)."""
    problems = []
    v = np.zeros(c.n)
    if not isinstance(doc_values, dict):
        return None, ["%s is not an object" % what]
    for i, name in enumerate(c.names):
        x = doc_values.get(name)
        if x is None:
            if not c.terminal[i]:
                problems.append("%s lacks state %r" % (what, name))
            continue
        if not isinstance(x, (int, float)) or isinstance(x, bool) or not math.isfinite(x):
            problems.append("%s[%r] is not a finite number" % (what, name))
            continue
        v[i] = float(x)
    unknown = set(doc_values) - set(c.names)
    if unknown:
        problems.append("%s has unknown states %s" % (what, sorted(unknown)[:3]))
    return v, problems


def check_solution(c, sol, v_lp, q_lp):
    """Compare a solution document with the LP reference. Returns (ok, detail)."""
    problems = []
    if sol.get("format") != "mdpserve/solution@1":
        problems.append("format is %r" % sol.get("format"))
    v_cli, p = read_value_map(c, sol.get("values"), "values")
    problems += p
    tol = value_tol(v_lp)
    tight = tight_tol(v_lp)
    err = float("nan")
    if v_cli is not None:
        diff = np.abs(v_cli - v_lp)
        err = float(diff.max())
        if err > tol:
            worst = int(diff.argmax())
            problems.append("value of %r is %.12g, LP says %.12g" %
                            (c.names[worst], v_cli[worst], v_lp[worst]))

    policy = sol.get("policy")
    near_ties = 0
    worst_gap = 0.0
    if not isinstance(policy, dict):
        problems.append("policy is not an object")
        policy = {}
    for i, name in enumerate(c.names):
        rows = c.rows_of_state[i]
        if not rows:
            continue
        a = policy.get(name)
        match = [r for r in rows if c.sa_action[r] == a]
        if not match:
            problems.append("policy[%r] = %r is not an available action" % (name, a))
            continue
        gap = c.gap(q_lp, i, match[0])
        worst_gap = max(worst_gap, gap)
        if gap > tol:
            problems.append("policy[%r] = %r is %.3g from the LP optimum" % (name, a, gap))
        elif gap > tight:
            near_ties += 1

    detail_states = sol.get("states")
    if not isinstance(detail_states, list):
        problems.append("states detail is missing")
        detail_states = []
    tie_tol = sol.get("tie_tolerance")
    vmax = float(np.max(np.abs(v_lp), initial=0.0))
    listed_tol = tol
    if isinstance(tie_tol, (int, float)) and not isinstance(tie_tol, bool):
        # Read generously: covers both an absolute and a relative tie tolerance.
        listed_tol = tol + abs(float(tie_tol)) * max(1.0, vmax)
    seen = set()
    q_err = 0.0
    for entry in detail_states:
        name = entry.get("state") if isinstance(entry, dict) else None
        if name not in c.index:
            problems.append("states detail names unknown state %r" % (name,))
            continue
        seen.add(name)
        i = c.index[name]
        rows = c.rows_of_state[i]
        if not rows:
            continue
        qmap = entry.get("q")
        if not isinstance(qmap, dict) or set(qmap) != {c.sa_action[r] for r in rows}:
            problems.append("q of %r does not list exactly the available actions" % name)
            continue
        for r in rows:
            qe = abs(float(qmap[c.sa_action[r]]) - q_lp[r])
            q_err = max(q_err, qe)
            if qe > tol:
                problems.append("q[%r][%r] is %.12g, LP says %.12g" %
                                (name, c.sa_action[r], float(qmap[c.sa_action[r]]), q_lp[r]))
        if abs(float(entry.get("value", float("nan"))) - v_lp[i]) > tol:
            problems.append("states detail value of %r differs from LP" % name)
        opt = entry.get("optimal_actions")
        if not isinstance(opt, list):
            problems.append("optimal_actions of %r missing" % name)
            continue
        if entry.get("action") != policy.get(name):
            problems.append("states detail action of %r differs from policy" % name)
        if policy.get(name) not in opt:
            problems.append("optimal_actions of %r lacks the chosen action" % name)
        for r in rows:
            a = c.sa_action[r]
            gap = c.gap(q_lp, i, r)
            if gap <= tight and a not in opt:
                problems.append("optimal_actions of %r lacks LP-optimal %r" % (name, a))
            if a in opt and gap > listed_tol:
                problems.append("optimal_actions of %r lists %r, %.3g from the LP optimum" %
                                (name, a, gap))
    missing = [nm for i, nm in enumerate(c.names) if c.rows_of_state[i] and nm not in seen]
    if detail_states and missing:
        problems.append("states detail lacks %d states, e.g. %r" % (len(missing), missing[0]))

    detail = "max |V-V_lp| %.3g (tol %.3g), max |Q-Q_lp| %.3g, worst action gap %.3g, near-ties %d" \
        % (err, tol, q_err, worst_gap, near_ties)
    if problems:
        more = " (+%d more)" % (len(problems) - 3) if len(problems) > 3 else ""
        detail += "; " + "; ".join(problems[:3]) + more
    return not problems, detail


def random_policies(c, rng):
    """A random deterministic policy and a random stochastic one, as (weights, document)."""
    det_w, det_doc = {}, {}
    sto_w, sto_doc = {}, {}
    for i, name in enumerate(c.names):
        rows = c.rows_of_state[i]
        if not rows:
            continue
        r = int(rng.choice(rows))
        det_w[r] = 1.0
        det_doc[name] = c.sa_action[r]
        if len(rows) == 1 or rng.random() < 0.3:
            r = int(rng.choice(rows))
            sto_w[r] = 1.0
            sto_doc[name] = c.sa_action[r]
        else:
            probs = normalised_probabilities(rng, len(rows))
            sto_doc[name] = {}
            for row, p in zip(rows, probs):
                sto_w[row] = p
                sto_doc[name][c.sa_action[row]] = p
    return [("deterministic", det_w, {"format": "mdpserve/policy@1", "policy": det_doc}),
            ("stochastic", sto_w, {"format": "mdpserve/policy@1", "policy": sto_doc})]


def check_model(tally, mdpserve, workdir, label, doc, seed, expected=None):
    c = Compiled(doc)
    model_path = os.path.join(workdir, "%s.model.json" % label)
    write_json(model_path, doc)
    summary = "n=%d sa=%d terminal=%d g=%g %s" % (c.n, c.m, int(c.terminal.sum()), c.g,
                                                  doc["objective"])

    v_lp, status, message, seconds = solve_lp(c)
    lp_ok = status == 0 and v_lp is not None
    detail = "%s, HiGHS status %d (%s), %.2f s" % (summary, status, message, seconds)
    if lp_ok:
        resid = float(np.max(np.abs(c.backup(v_lp) - v_lp), initial=0.0))
        lp_tol = max(LP_RESIDUAL_ABS_TOL,
                     LP_RESIDUAL_REL_TOL * float(np.max(np.abs(v_lp), initial=0.0)))
        detail += ", Bellman residual %.3g (tol %.3g)" % (resid, lp_tol)
        if resid > lp_tol:
            lp_ok = False
        if expected is not None:
            want = np.array([expected[nm] for nm in c.names])
            e = float(np.max(np.abs(want - v_lp)))
            detail += ", closed-form error %.3g" % e
            if e > 1e-9:
                lp_ok = False
    tally.report(lp_ok, "%s LP reference" % label, detail)

    if lp_ok:
        q_lp = c.q_table(v_lp)
        for method in METHODS:
            out_path = os.path.join(workdir, "%s.%s.solution.json" % (label, method))
            ok, _, problem = run_cli([mdpserve, "solve", model_path, "--method", method,
                                      "--tolerance", SOLVE_TOLERANCE, "--out", out_path])
            name = "%s solve %s" % (label, method)
            if not ok:
                tally.report(False, name, problem)
                continue
            try:
                with open(out_path, encoding="utf-8") as f:
                    sol = json.load(f)
            except (OSError, ValueError) as e:
                tally.report(False, name, "cannot read solution: %s" % e)
                continue
            ok, detail = check_solution(c, sol, v_lp, q_lp)
            tally.report(ok, name, detail)
    else:
        for method in METHODS:
            tally.report(False, "%s solve %s" % (label, method), "skipped: no LP reference")

    rng = np.random.default_rng(10_000 + seed)
    for kind, weights, pdoc in random_policies(c, rng):
        name = "%s evaluate %s policy" % (label, kind)
        policy_path = os.path.join(workdir, "%s.%s.policy.json" % (label, kind))
        write_json(policy_path, pdoc)
        v_ref = exact_policy_values(c, weights)
        ok, stdout, problem = run_cli([mdpserve, "evaluate", model_path, "--policy", policy_path])
        if not ok:
            tally.report(False, name, problem)
            continue
        try:
            ev = json.loads(stdout)
        except ValueError as e:
            tally.report(False, name, "stdout is not JSON: %s" % e)
            continue
        problems = []
        if not isinstance(ev, dict):
            tally.report(False, name, "stdout is not a JSON object")
            continue
        if ev.get("format") != "mdpserve/evaluation@1":
            problems.append("format is %r" % ev.get("format"))
        v_cli, p = read_value_map(c, ev.get("values"), "values")
        problems += p
        tol = eval_tol(v_ref)
        err = float("nan")
        if v_cli is not None:
            diff = np.abs(v_cli - v_ref)
            err = float(diff.max())
            if err > tol:
                worst = int(diff.argmax())
                problems.append("value of %r is %.15g, exact %.15g" %
                                (c.names[worst], v_cli[worst], v_ref[worst]))
        detail = "max |V-V_exact| %.3g (tol %.3g)" % (err, tol)
        if problems:
            detail += "; " + "; ".join(problems[:3])
        tally.report(not problems, name, detail)


def main():
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--mdpserve", required=True, help="path to the mdpserve CLI binary")
    parser.add_argument("--seeds", type=int, default=8,
                        help="number of random models (seeds first..first+N-1), default 8")
    parser.add_argument("--first-seed", type=int, default=0, help="first seed, default 0")
    parser.add_argument("--large", action="store_true",
                        help="also check the LARGE_MODELS (over 3000 states; about a minute)")
    parser.add_argument("--keep", metavar="DIR",
                        help="write models and outputs to DIR instead of a temporary directory")
    args = parser.parse_args()
    mdpserve = os.path.abspath(args.mdpserve)

    tally = Tally()

    def run_all(workdir):
        doc, expected = duplicate_next_model()
        check_model(tally, mdpserve, workdir, "dup-next", doc, seed=-1, expected=expected)
        for seed in range(args.first_seed, args.first_seed + args.seeds):
            check_model(tally, mdpserve, workdir, "seed%02d" % seed, random_model(seed), seed)
        for seed, *shape in (LARGE_MODELS if args.large else ()):
            check_model(tally, mdpserve, workdir, "large%03d" % seed,
                        random_model(seed, tuple(shape)), seed)

    if args.keep:
        os.makedirs(args.keep, exist_ok=True)
        run_all(args.keep)
    else:
        with tempfile.TemporaryDirectory(prefix="mdpserve-lpref-") as workdir:
            run_all(workdir)

    print("%d passed, %d failed" % (tally.passed, tally.failed))
    return 1 if tally.failed else 0


if __name__ == "__main__":
    sys.exit(main())
