#!/usr/bin/python3
"""Generate the demo model documents in api-schema/examples/.

Run from anywhere with /usr/bin/python3:

    /usr/bin/python3 scripts/make_examples.py [--root REPO] [--check]

The six scenarios are invented for mdpserve's documentation and tests:

* pump-maintenance.json   (minimize, discounted) - a process pump that wears out over the weeks,
* warehouse-robot.json    (maximize, discounted) - a robot driving to its charging dock on a grid,
* bakery-reorder.json     (maximize, discounted) - a bakery ordering loaves each morning,
* icecream-stocking.json  (maximize, finite_horizon) - a beach kiosk's weekly stock over an
  8-week season, with salvage values for the stock left at the end,
* press-upkeep.json       (maximize, average) - a print shop's press upkeep, judged by the
  long-run profit per day,
* drone-delivery.json     (minimize, total) - a drone flying home to its charging pad through
  gusts, energy per move, with one trap cell (a bird net) that never reaches the pad.

All probabilities and money amounts are computed in decimal arithmetic, so that every number
is written as a short literal (0.765, not 0.7650000000000001) and the probabilities of every
state action sum to exactly 1 in decimal. A small value iteration in this script checks the
ties and near-ties that the model descriptions promise, and small reference solvers for the
other criteria (backward induction, relative value iteration, total reward over the actions
that surely reach a goal) check the promises of the other three, so that a change of
parameters that breaks a promise fails here instead of going unnoticed.
tests/schema/check_schemas.py imports those reference solvers to check the CLI's answers.

--check compares the generated documents with the files on disk instead of writing them
(exit status 1 when they differ).
"""

import argparse
import json
import os
import sys
from decimal import Decimal

D = Decimal


def num(x):
    """A Decimal (or int) as a JSON number whose repr is the same short decimal."""
    if isinstance(x, int):
        return x
    f = float(x)
    if D(repr(f)) != x:
        raise ValueError("%s is not exactly representable as a short float literal" % x)
    if f == int(f) and abs(f) < 2 ** 53:
        return float(int(f))
    return f


def make_outcomes(pairs):
    """pairs: list of (next, Decimal probability, Decimal reward). Merges equal (next, reward)
    pairs, keeping first-occurrence order, drops zero probabilities, checks the sum is exactly 1.
    Returns the JSON list of outcomes."""
    merged = []
    index = {}
    for nxt, p, r in pairs:
        if p == 0:
            continue
        key = (nxt, r)
        if key in index:
            merged[index[key]][1] += p
        else:
            index[key] = len(merged)
            merged.append([nxt, p, r])
    total = sum(p for _, p, _ in merged)
    if total != 1:
        raise ValueError("probabilities sum to %s" % total)
    out = []
    for nxt, p, r in merged:
        o = {"next": nxt, "probability": num(p)}
        if r != 0:
            o["reward"] = num(r)
        out.append(o)
    return out


def state_action(action, outcomes, reward=None):
    sa = {"action": action}
    if reward is not None and reward != 0:
        sa["reward"] = num(reward)
    sa["outcomes"] = outcomes
    return sa


# --------------------------------------------------------------------------------------------
# A small exact-enough solver, used only to check the promises made in the descriptions.

def q_table(doc, tol=1e-13, max_sweeps=100000):
    """Value iteration on a model document. Returns (V, Q) with Q[state][action]."""
    g = doc["criterion"]["discount"]
    better = max if doc["objective"] == "maximize" else min
    states = doc["states"]
    V = {s["name"]: 0.0 for s in states}
    for _ in range(max_sweeps):
        Q = {}
        for s in states:
            row = {}
            for sa in s.get("actions", []):
                total = sa.get("reward", 0.0)
                for o in sa["outcomes"]:
                    total += o["probability"] * (o.get("reward", 0.0) + g * V[o["next"]])
                row[sa["action"]] = total
            Q[s["name"]] = row
        newV = {n: (better(row.values()) if row else 0.0) for n, row in Q.items()}
        delta = max(abs(newV[n] - V[n]) for n in V)
        V = newV
        if delta < tol:
            return V, Q
    raise RuntimeError("value iteration did not converge")


def ranked(doc, Q, state):
    """Actions of a state, best first, with their Q values."""
    sign = -1.0 if doc["objective"] == "maximize" else 1.0
    return sorted(Q[state].items(), key=lambda kv: sign * kv[1])


# --------------------------------------------------------------------------------------------
# Pump maintenance (minimize costs, in kEUR).

PUMP_CONDITIONS = ["new", "good", "worn", "degraded", "failed"]
PUMP_SEASONS = ["peak", "off"]
# Weekly season change: the plant's peak season lasts about ten weeks, the off season twenty.
PUMP_SEASON_NEXT = {"peak": {"peak": D("0.9"), "off": D("0.1")},
                    "off": {"off": D("0.95"), "peak": D("0.05")}}
# Condition after one week of running.
PUMP_WEAR = {
    "new": {"new": D("0.9"), "good": D("0.1")},
    "good": {"good": D("0.85"), "worn": D("0.12"), "failed": D("0.03")},
    "worn": {"worn": D("0.75"), "degraded": D("0.2"), "failed": D("0.05")},
    "degraded": {"degraded": D("0.7"), "failed": D("0.3")},
}
# Condition after a routine service (done within the week, the pump then runs again).
PUMP_SERVICE = {
    "good": {"new": D("0.5"), "good": D("0.5")},
    "worn": {"good": D("0.9"), "worn": D("0.1")},
    "degraded": {"good": D("0.6"), "worn": D("0.4")},
}
# Lost production in a week of running, by condition and season (throughput drops as it wears).
PUMP_LOST = {"peak": {"new": D("0"), "good": D("0.2"), "worn": D("0.8"), "degraded": D("2.5")},
             "off": {"new": D("0"), "good": D("0.1"), "worn": D("0.3"), "degraded": D("1")}}
PUMP_SERVICE_COST = D("4")        # technician and parts
PUMP_SERVICE_DOWNTIME = {"peak": D("1.5"), "off": D("0.6")}   # one day offline
PUMP_REPLACE_COST = D("12")       # a new pump, installed
PUMP_REPLACE_DOWNTIME = {"peak": D("3"), "off": D("1.2")}     # two days offline
PUMP_FAILURE_COST = D("5")        # emergency stop, cleanup, overtime; on the failing transition


def pump_name(cond, season):
    return "%s_%s" % (cond, season)


def pump_model():
    states = []
    for cond in PUMP_CONDITIONS:
        for season in PUMP_SEASONS:
            seasons = PUMP_SEASON_NEXT[season]
            actions = []

            def spread(cond_dist, failure_reward=False):
                pairs = []
                for c2, pc in cond_dist.items():
                    for s2, ps in seasons.items():
                        r = PUMP_FAILURE_COST if (failure_reward and c2 == "failed") else D(0)
                        pairs.append((pump_name(c2, s2), pc * ps, r))
                return make_outcomes(pairs)

            if cond != "failed":
                actions.append(state_action("run", spread(PUMP_WEAR[cond], True),
                                            PUMP_LOST[season][cond]))
            if cond in PUMP_SERVICE:
                actions.append(state_action(
                    "service", spread(PUMP_SERVICE[cond]),
                    PUMP_SERVICE_COST + PUMP_SERVICE_DOWNTIME[season]))
            replace_cost = PUMP_REPLACE_COST + PUMP_REPLACE_DOWNTIME[season]
            if cond == "failed":
                # The service contract covers a failed pump by an exchange overhaul: the vendor
                # swaps in an as-new rebuilt unit, billed at the price of a new pump, with the same
                # two days of downtime. So here `service` and `replace` are the same transaction.
                actions.append(state_action("service", spread({"new": D(1)}), replace_cost))
            if cond in ("worn", "degraded", "failed"):
                actions.append(state_action("replace", spread({"new": D(1)}), replace_cost))
            st = {"name": pump_name(cond, season),
                  "description": "Pump in %s condition during the %s season." % (
                      cond, "peak" if season == "peak" else "off-peak"),
                  "actions": actions}
            states.append(st)
    doc = {
        "format": "mdpserve/model@1",
        "name": "Process pump maintenance",
        "description": (
            "A process pump in a bottling plant is inspected every Monday and found in one of "
            "five conditions: new, good, worn, degraded or failed. The plant has a peak season "
            "(about ten weeks, with twice the throughput at stake) and an off season (about "
            "twenty weeks), so each state is a condition and a season. Each week the "
            "maintenance lead can 'run' the pump as it is (costing the production lost to its "
            "reduced throughput, and risking failure, which adds an emergency cost of %s kEUR "
            "on the failing transition), 'service' it (%s kEUR plus a day of downtime; it "
            "usually comes back one or two condition levels better) or 'replace' it (%s kEUR "
            "plus two days of downtime; it comes back new). A failed pump cannot run. Costs "
            "are in kEUR and discounted by 0.97 per week. Exact tie: in the failed states "
            "(failed_peak, failed_off) the service contract turns 'service' into an exchange "
            "overhaul billed like a new pump, so 'service' and 'replace' have identical "
            "outcomes and costs there and their Q values are exactly equal; both are optimal. "
            "The new states offer only 'run', so they have no action gap."
            % (PUMP_FAILURE_COST, PUMP_SERVICE_COST, PUMP_REPLACE_COST)),
        "reward_unit": "kEUR",
        "objective": "minimize",
        "criterion": {"kind": "discounted", "discount": 0.97},
        "actions": ["run", "service", "replace"],
        "states": states,
    }
    return doc


def check_pump(doc):
    V, Q = q_table(doc)
    for season in PUMP_SEASONS:
        s = pump_name("failed", season)
        assert Q[s]["service"] == Q[s]["replace"], Q[s]
    # Both are then trivially optimal: they are the only actions in the failed states.
    return ["pump: %s service == replace == %.6f" % (pump_name("failed", s),
                                                      Q[pump_name("failed", s)]["service"])
            for s in PUMP_SEASONS]


# --------------------------------------------------------------------------------------------
# Warehouse robot (maximize).

GRID_ROWS, GRID_COLS = 4, 5
SHELVES = {(1, 1), (1, 3), (2, 2)}
DOCK = (3, 2)
MOVES = {"north": (-1, 0), "south": (1, 0), "west": (0, -1), "east": (0, 1)}
ROBOT_STEP_COST = D("-1")        # energy and time of one move, whatever happens
ROBOT_SHELF_BUMP = D("-3")       # brushing a shelf: risk of knocking goods off
ROBOT_DOCK_REWARD = D("10")      # docking with charge left
ROBOT_INTENDED, ROBOT_SLIP = D("0.8"), D("0.1")


def cell_name(r, c):
    return "r%dc%d" % (r, c)


def robot_slips(move, c):
    """Perpendicular slip directions in an order that is the mirror image of the order used in
    the mirror cell (column c <-> GRID_COLS-1-c), so that mirror states do the same arithmetic."""
    if move in ("west", "east"):
        return ["north", "south"]
    return ["west", "east"] if c <= (GRID_COLS - 1) // 2 else ["east", "west"]


def robot_model():
    states = []
    for r in range(GRID_ROWS):
        for c in range(GRID_COLS):
            if (r, c) in SHELVES:
                continue
            if (r, c) == DOCK:
                states.append({"name": cell_name(r, c),
                               "description": "The charging dock: the episode ends here.",
                               "terminal": True})
                continue
            actions = []
            for move in ["north", "south", "west", "east"]:
                pairs = []
                for direction, p in [(move, ROBOT_INTENDED)] + [
                        (d, ROBOT_SLIP) for d in robot_slips(move, c)]:
                    dr, dc = MOVES[direction]
                    r2, c2 = r + dr, c + dc
                    reward = D(0)
                    if not (0 <= r2 < GRID_ROWS and 0 <= c2 < GRID_COLS):
                        r2, c2 = r, c            # wall: stays put
                    elif (r2, c2) in SHELVES:
                        r2, c2 = r, c            # shelf: stays put, with a bump
                        reward = ROBOT_SHELF_BUMP
                    elif (r2, c2) == DOCK:
                        reward = ROBOT_DOCK_REWARD
                    pairs.append((cell_name(r2, c2), p, reward))
                actions.append(state_action(move, make_outcomes(pairs), ROBOT_STEP_COST))
            states.append({"name": cell_name(r, c), "actions": actions})
    picture = []
    for r in range(GRID_ROWS):
        row = []
        for c in range(GRID_COLS):
            row.append("#" if (r, c) in SHELVES else ("D" if (r, c) == DOCK else "."))
        picture.append("".join(row))
    doc = {
        "format": "mdpserve/model@1",
        "name": "Warehouse robot returning to its dock",
        "description": (
            "A small picking robot in a 4-row, 5-column storage bay must return to its charging "
            "dock. Cells are named rRcC (row R from the top, column C from the left). Layout, "
            "top row first ('#' shelf, 'D' dock): " + " / ".join(picture) + ". The floor is "
            "slippery: a move north, south, west or east goes as intended with probability "
            "0.8 and slides to either side (perpendicular) with probability 0.1 each. Driving "
            "into the outer wall leaves the robot in place; driving into a shelf leaves it in "
            "place with an extra penalty of 3 for the risk of knocking goods off. Every move "
            "costs 1 (energy and time) and reaching the dock earns 10; the dock is terminal. "
            "Rewards are discounted by 0.95 per move. The bay is mirror-symmetric about column "
            "2. Tie: in r0c2, straight above the shelf r2c2 that guards the dock (r1c2 below it "
            "is a dead end), going 'west' and going 'east' are mirror images, so their Q values "
            "are equal in exact arithmetic (in floating point they may differ by rounding, far "
            "below any tie tolerance); both are optimal."),
        "reward_unit": "points",
        "objective": "maximize",
        "criterion": {"kind": "discounted", "discount": 0.95},
        "actions": ["north", "south", "west", "east"],
        "states": states,
    }
    return doc


def check_robot(doc):
    V, Q = q_table(doc)
    best = ranked(doc, Q, "r0c2")
    names = {best[0][0], best[1][0]}
    assert names == {"west", "east"}, best
    assert abs(best[0][1] - best[1][1]) < 1e-12, best
    assert best[1][1] - best[2][1] > 0.1, best
    return ["robot: r0c2 west %.15g east %.15g (next best %s %.6f)" % (
        Q["r0c2"]["west"], Q["r0c2"]["east"], best[2][0], best[2][1])]


# --------------------------------------------------------------------------------------------
# Bakery reorder (maximize profit, EUR per day).

BAKERY_MAX_OLD = 7                      # day-old loaves on hand at opening: 0..7
BAKERY_ORDERS = list(range(0, 8))       # fresh loaves ordered for the morning delivery
BAKERY_DEMAND = [D("0.04"), D("0.08"), D("0.14"), D("0.2"), D("0.24"), D("0.18"), D("0.12")]
BAKERY_UNIT_COST = D("1.1")             # per fresh loaf from the wholesale bakery
BAKERY_DELIVERY_FEE = D("2.8")          # per delivery, whatever its size
BAKERY_PRICE_FRESH = D("3")
BAKERY_PRICE_OLD = D("1.4")
BAKERY_DISPOSAL = D("0.2")              # per day-old loaf still unsold at closing
BAKERY_HOLDING = D("0.05")              # per loaf kept overnight (bags, shelf space)
BAKERY_LOST_SALE = D("0.3")             # goodwill lost per customer sent away empty-handed


def bakery_name(old):
    return "day_old_%d" % old


def bakery_model():
    assert sum(BAKERY_DEMAND) == 1
    states = []
    for old in range(BAKERY_MAX_OLD + 1):
        actions = []
        for q in BAKERY_ORDERS:
            pairs = []
            for demand, p in enumerate(BAKERY_DEMAND):
                sold_fresh = min(q, demand)
                sold_old = min(old, demand - sold_fresh)
                lost = demand - sold_fresh - sold_old
                wasted = old - sold_old
                kept = q - sold_fresh             # fresh today, day-old tomorrow
                reward = (BAKERY_PRICE_FRESH * sold_fresh + BAKERY_PRICE_OLD * sold_old
                          - BAKERY_DISPOSAL * wasted - BAKERY_HOLDING * kept
                          - BAKERY_LOST_SALE * lost)
                pairs.append((bakery_name(kept), p, reward))
            order_cost = -(BAKERY_UNIT_COST * q + (BAKERY_DELIVERY_FEE if q > 0 else 0))
            actions.append(state_action("order_%d" % q, make_outcomes(pairs), order_cost))
        states.append({"name": bakery_name(old),
                       "description": "%d loaves left from yesterday at opening." % old,
                       "actions": actions})
    doc = {
        "format": "mdpserve/model@1",
        "name": "Village bakery bread reorder",
        "description": None,  # filled in by bakery_describe once the near-tie is known
        "reward_unit": "EUR",
        "objective": "maximize",
        "criterion": {"kind": "discounted", "discount": 0.98},
        "actions": ["order_%d" % q for q in BAKERY_ORDERS],
        "states": states,
    }
    return doc


def bakery_near_tie(doc):
    """The state where the two best actions are closest, with their names and the gap."""
    V, Q = q_table(doc)
    best = None
    for s in doc["states"]:
        r = ranked(doc, Q, s["name"])
        gap = abs(r[0][1] - r[1][1])
        if best is None or gap < best[3]:
            best = (s["name"], r[0][0], r[1][0], gap)
    return best


def bakery_describe(doc):
    state, a1, a2, gap = bakery_near_tie(doc)
    assert gap < 0.01, (state, a1, a2, gap)
    doc["description"] = (
        "A village shop sells bread from a wholesale bakery. The state is the number of "
        "day-old loaves on the shelf at opening (day_old_0 to day_old_7). Each morning the "
        "shopkeeper orders 0 to 7 fresh loaves (action order_N), delivered before opening: "
        "%.2f EUR a loaf plus a %.2f EUR delivery fee for any non-empty order; this purchase "
        "cost is the state action's reward. During the day 0 to 6 customers come (probabilities "
        "0.04, 0.08, 0.14, 0.20, 0.24, 0.18, 0.12), each wanting one loaf: fresh bread sells "
        "first at 3.00 EUR, then day-old bread at 1.40 EUR, and a customer who finds nothing "
        "costs 0.30 EUR of goodwill. At closing, unsold day-old loaves are thrown away (0.20 "
        "EUR disposal each) and unsold fresh loaves are kept overnight (0.05 EUR each) to become "
        "tomorrow's day-old stock. Sales, disposal, holding and goodwill are outcome rewards, "
        "so the same next state appears in several outcomes with different rewards (for "
        "example every day that sells out all fresh bread leads to day_old_0, with takings that "
        "depend on how many customers came). Profit is discounted by 0.98 per day. Near-tie: "
        "in %s, '%s' and '%s' are the two best actions and their Q values differ by only "
        "about %.4f EUR, so a small change in prices would flip the decision there."
        % (BAKERY_UNIT_COST, BAKERY_DELIVERY_FEE, state, a1, a2, gap))
    return ["bakery: near-tie in %s between %s and %s, gap %.6g" % (state, a1, a2, gap)]


# --------------------------------------------------------------------------------------------
# Reference solvers for the other criteria (plain Python, independent of mdpserve's C++), used
# to check the promises of the descriptions; tests/schema/check_schemas.py also compares the
# CLI's answers with them.

def expected_rewards(doc):
    """{state: {action: (r(s, a), [(next, probability), ...])}} of a model document."""
    out = {}
    for s in doc["states"]:
        row = {}
        for sa in s.get("actions", []):
            r = sa.get("reward", 0.0)
            nxt = []
            for o in sa["outcomes"]:
                r += o["probability"] * o.get("reward", 0.0)
                nxt.append((o["next"], o["probability"]))
            row[sa["action"]] = (r, nxt)
        out[s["name"]] = row
    return out


def backward_induction(doc):
    """Finite horizon: [V_0, ..., V_H] and [Q_0, ..., Q_{H-1}] (dicts by state name)."""
    c = doc["criterion"]
    g = c.get("discount", 1.0)
    better = max if doc["objective"] == "maximize" else min
    rows = expected_rewards(doc)
    V = [None] * (c["horizon"] + 1)
    Q = [None] * c["horizon"]
    V[-1] = {n: c.get("terminal_values", {}).get(n, 0.0) for n in rows}
    for t in range(c["horizon"] - 1, -1, -1):
        Q[t] = {n: {a: r + g * sum(p * V[t + 1][x] for x, p in nxt)
                    for a, (r, nxt) in row.items()} for n, row in rows.items()}
        V[t] = {n: (better(q.values()) if q else 0.0) for n, q in Q[t].items()}
    return V, Q


def relative_value_iteration(doc, tau=0.5, tol=1e-11, max_sweeps=1000000):
    """Average reward of a model whose optimal gain is the same in every state: returns
    (gain_lower, gain_upper, bias h with h = 0 at the first state, q = r + P h - gain). Uses
    the aperiodicity transformation p' = tau [s' = s] + (1 - tau) p, whose bias is h / (1 - tau)."""
    better = max if doc["objective"] == "maximize" else min
    rows = expected_rewards(doc)
    names = list(rows)
    ref = names[0]
    v = {n: 0.0 for n in names}
    for _ in range(max_sweeps):
        tv = {}
        for n, row in rows.items():
            if not row:
                tv[n] = v[n]  # terminal: absorbing, reward 0
                continue
            tv[n] = better(r + tau * v[n] + (1 - tau) * sum(p * v[x] for x, p in nxt)
                           for r, nxt in row.values())
        d = [tv[n] - v[n] for n in names]
        lo, hi = min(d), max(d)
        v = {n: tv[n] - tv[ref] for n in names}
        if hi - lo < tol:
            break
    else:
        raise RuntimeError("relative value iteration did not converge")
    gain = (lo + hi) / 2
    h = {n: (1 - tau) * v[n] for n in names}
    q = {n: {a: r + sum(p * h[x] for x, p in nxt) - gain for a, (r, nxt) in row.items()}
         for n, row in rows.items()}
    return lo, hi, h, q


def goal_reaching(doc):
    """Total criterion: (A, safe) where A is the set of states from which some policy reaches
    a terminal state with probability 1 and safe[s] the actions of s whose next states all lie
    in A (the almost-sure reachability fixed point)."""
    rows = expected_rewards(doc)
    goals = {s["name"] for s in doc["states"] if s.get("terminal", False)}
    A = set(rows)
    while True:
        safe = {n: {a for a, (_, nxt) in rows[n].items() if all(x in A for x, _ in nxt)}
                for n in A}
        reach = set(goals)
        grew = True
        while grew:
            grew = False
            for n in A - reach:
                if any(any(x in reach for x, p in rows[n][a][1] if p > 0) for a in safe[n]):
                    reach.add(n)
                    grew = True
        if reach == A:
            return A, safe
        A = reach


def total_reward(doc, tol=1e-12, max_sweeps=1000000):
    """Total reward until a goal over the safe actions, by value iteration from 0 (converges
    here because every loop that avoids the goals costs something). Returns (V, Q, steps):
    V[s] None outside A, Q[s][a] None for unsafe actions, steps[s] the expected steps to a goal
    of the greedy policy (None outside A)."""
    better = max if doc["objective"] == "maximize" else min
    rows = expected_rewards(doc)
    goals = {s["name"] for s in doc["states"] if s.get("terminal", False)}
    A, safe = goal_reaching(doc)
    V = {n: 0.0 for n in A}
    for _ in range(max_sweeps):
        delta = 0.0
        for n in A - goals:
            new = better(rows[n][a][0] + sum(p * V[x] for x, p in rows[n][a][1])
                         for a in safe[n])
            delta = max(delta, abs(new - V[n]))
            V[n] = new
        if delta < tol:
            break
    else:
        raise RuntimeError("total-reward value iteration did not converge")
    Q = {n: {a: (r + sum(p * V[x] for x, p in nxt) if n in A and a in safe[n] else None)
             for a, (r, nxt) in row.items()} for n, row in rows.items()}
    pick = {n: better((a for a in Q[n] if Q[n][a] is not None), key=lambda a: Q[n][a])
            for n in A - goals}
    return {n: V.get(n) for n in rows}, Q, expected_steps(doc, pick)


def expected_steps(doc, policy, tol=1e-12, max_sweeps=1000000):
    """Expected number of steps to a terminal state under a deterministic policy ({state:
    action}, defined on the states that reach a goal), by iterating N = 1 + P N from 0; None
    for states outside the policy."""
    rows = expected_rewards(doc)
    goals = {s["name"] for s in doc["states"] if s.get("terminal", False)}
    steps = {n: 0.0 for n in list(policy) + list(goals)}
    for _ in range(max_sweeps):
        delta = 0.0
        for n, a in policy.items():
            new = 1.0 + sum(p * steps[x] for x, p in rows[n][a][1])
            delta = max(delta, abs(new - steps[n]))
            steps[n] = new
        if delta < tol:
            return {n: steps.get(n) for n in rows}
    raise RuntimeError("expected steps did not converge (the policy misses the goals)")


# --------------------------------------------------------------------------------------------
# Ice-cream stand stocking plan (finite horizon, maximize EUR).

ICE_CAPACITY = 8                           # cases the freezer holds
ICE_WEEKS = 8                              # the summer season
ICE_WEATHER_NEXT = {"sunny": {"sunny": D("0.7"), "cool": D("0.3")},
                    "cool": {"cool": D("0.6"), "sunny": D("0.4")}}
ICE_DEMAND = {"sunny": {2: D("0.1"), 3: D("0.2"), 4: D("0.3"), 5: D("0.25"), 6: D("0.15")},
              "cool": {0: D("0.15"), 1: D("0.3"), 2: D("0.35"), 3: D("0.2")}}
ICE_ORDERS = list(range(0, 7))             # cases ordered on Monday, delivered at once
ICE_CASE_COST = D("9")                     # wholesale price of a case
ICE_DELIVERY_FEE = D("6")                  # per delivery
ICE_PRICE = D("20")                        # takings per case sold (by the scoop)
ICE_FREEZER = D("0.5")                     # electricity per case kept over the weekend
ICE_SHORTAGE = D("2")                      # goodwill per case of demand turned away
ICE_SALVAGE = D("4")                       # per case left at the end, sold to a cafe


def ice_name(stock, weather):
    return "stock_%d_%s" % (stock, weather)


def ice_model():
    states = []
    for stock in range(ICE_CAPACITY + 1):
        for weather in ("sunny", "cool"):
            actions = []
            for q in ICE_ORDERS:
                if stock + q > ICE_CAPACITY:
                    continue
                on_hand = stock + q
                pairs = []
                for demand, pd in ICE_DEMAND[weather].items():
                    sold = min(on_hand, demand)
                    left = on_hand - sold
                    reward = ICE_PRICE * sold - ICE_FREEZER * left - ICE_SHORTAGE * (demand - sold)
                    for w2, pw in ICE_WEATHER_NEXT[weather].items():
                        pairs.append((ice_name(left, w2), pd * pw, reward))
                cost = -(ICE_CASE_COST * q + (ICE_DELIVERY_FEE if q > 0 else 0))
                actions.append(state_action("order_%d" % q, make_outcomes(pairs), cost))
            states.append({"name": ice_name(stock, weather),
                           "description": "%d cases in the freezer on Monday, %s week ahead." % (
                               stock, "a sunny" if weather == "sunny" else "a cool"),
                           "actions": actions})
    salvage = {ice_name(k, w): num(ICE_SALVAGE * k)
               for k in range(1, ICE_CAPACITY + 1) for w in ("sunny", "cool")}
    return {
        "format": "mdpserve/model@1",
        "name": "Beach ice-cream stand: summer stocking plan",
        "description": None,  # filled in by ice_describe from the backward induction
        "reward_unit": "EUR",
        "objective": "maximize",
        "criterion": {"kind": "finite_horizon", "horizon": ICE_WEEKS,
                      "terminal_values": salvage},
        "actions": ["order_%d" % q for q in ICE_ORDERS],
        "states": states,
    }


def ice_orders(Q, t, state):
    """The order picked at stage t: the best Q, ties to the smaller order (document order)."""
    row = Q[t][state]
    best = max(row.values())
    return min(int(a.split("_")[1]) for a, q in row.items() if q >= best - 1e-9)


def ice_describe(doc):
    V, Q = backward_induction(doc)
    first = {w: ice_orders(Q, 0, ice_name(0, w)) for w in ("sunny", "cool")}
    last = {w: ice_orders(Q, ICE_WEEKS - 1, ice_name(0, w)) for w in ("sunny", "cool")}
    # The promise: near the end the salvage price (below cost) makes the stand order less.
    assert last["sunny"] < first["sunny"], (first, last)
    assert last["cool"] <= first["cool"], (first, last)
    doc["description"] = (
        "A beach kiosk sells ice cream by the scoop during an %d-week summer season and plans "
        "its weekly stock. The state on Monday morning is the number of 5-litre cases in the "
        "freezer (0 to %d, its capacity) and the week's weather forecast (sunny or cool; a "
        "sunny week is followed by another with probability 0.7, a cool one by a cool one "
        "with probability 0.6). Each Monday the owner orders 0 to 6 cases (order_N, only as "
        "many as fit), delivered at once: %s EUR a case plus a %s EUR delivery fee. Demand "
        "for the week in cases is 2 to 6 when sunny (probabilities 0.10, 0.20, 0.30, 0.25, "
        "0.15) and 0 to 3 when cool (0.15, 0.30, 0.35, 0.20). Each case sold brings %s EUR; "
        "each case of demand turned away costs %s EUR of goodwill; each case kept over the "
        "weekend costs %s EUR of freezer electricity. After the last week the stock left is "
        "sold to a cafe for %s EUR a case: these are the terminal values (the empty freezer "
        "is worth 0, so it is not listed). Undiscounted (the default discount 1). Stage "
        "matters: with the whole season ahead (stage 0, 8 weeks to go) an empty freezer "
        "before a sunny week gets order_%d (order_%d before a cool one), but in the last "
        "week (stage 7) only order_%d (order_%d), because a case left over then is worth "
        "less than it cost. Expected season profit from an empty freezer before a sunny "
        "first week: %.2f EUR."
        % (ICE_WEEKS, ICE_CAPACITY, ICE_CASE_COST, ICE_DELIVERY_FEE, ICE_PRICE, ICE_SHORTAGE,
           ICE_FREEZER, ICE_SALVAGE, first["sunny"], first["cool"], last["sunny"],
           last["cool"], V[0][ice_name(0, "sunny")]))
    return ["ice: empty freezer orders %s at stage 0, %s at stage %d; V0(stock_0_sunny) %.6f"
            % (first, last, ICE_WEEKS - 1, V[0][ice_name(0, "sunny")])]


# --------------------------------------------------------------------------------------------
# Print shop press upkeep (average reward, maximize EUR per day).

PRESS_CONDITIONS = ["new", "good", "fair", "poor", "broken"]
PRESS_ORDERS = {"quiet": {"quiet": D("0.7"), "busy": D("0.3")},
                "busy": {"busy": D("0.6"), "quiet": D("0.4")}}
PRESS_REVENUE = {"quiet": D("400"), "busy": D("900")}         # a full day's printing when new
PRESS_QUALITY = {"new": D("1"), "good": D("0.95"), "fair": D("0.8"), "poor": D("0.55")}
PRESS_WEAR = {   # condition after a day of printing
    "new": {"new": D("0.85"), "good": D("0.15")},
    "good": {"good": D("0.8"), "fair": D("0.17"), "broken": D("0.03")},
    "fair": {"fair": D("0.7"), "poor": D("0.22"), "broken": D("0.08")},
    "poor": {"poor": D("0.6"), "broken": D("0.4")},
}
PRESS_CLEAN = {  # condition after a half-day clean and half a day of printing
    "new": {"new": D("1")},
    "good": {"new": D("0.3"), "good": D("0.7")},
    "fair": {"good": D("0.5"), "fair": D("0.5")},
    "poor": {"fair": D("0.5"), "poor": D("0.5")},
}
PRESS_CLEAN_COST = D("60")
PRESS_OVERHAUL_COST = D("500")      # a technician's full day; the press comes back new
PRESS_REPAIR_COST = D("300")        # a quick fix of a broken press (no printing that day)
PRESS_REPAIR = {"good": D("0.4"), "fair": D("0.6")}


def press_name(cond, orders):
    return "%s_%s" % (cond, orders)


def press_model():
    states = []
    for cond in PRESS_CONDITIONS:
        for orders in ("quiet", "busy"):
            def spread(cond_dist):
                return make_outcomes([(press_name(c2, o2), pc * po, D(0))
                                      for c2, pc in cond_dist.items()
                                      for o2, po in PRESS_ORDERS[orders].items()])
            actions = []
            if cond != "broken":
                day = PRESS_REVENUE[orders] * PRESS_QUALITY[cond]
                actions.append(state_action("print", spread(PRESS_WEAR[cond]), day))
                actions.append(state_action("clean", spread(PRESS_CLEAN[cond]),
                                            day / 2 - PRESS_CLEAN_COST))
            else:
                actions.append(state_action("repair", spread(PRESS_REPAIR), -PRESS_REPAIR_COST))
            if cond != "new":
                actions.append(state_action("overhaul", spread({"new": D(1)}),
                                            -PRESS_OVERHAUL_COST))
            states.append({"name": press_name(cond, orders),
                           "description": "The press is %s; the order book is %s today." % (
                               cond, orders),
                           "actions": actions})
    return {
        "format": "mdpserve/model@1",
        "name": "Print shop press upkeep",
        "description": None,  # filled in by press_describe from relative value iteration
        "reward_unit": "EUR",
        "objective": "maximize",
        "criterion": {"kind": "average"},
        "actions": ["print", "clean", "overhaul", "repair"],
        "states": states,
    }


def press_describe(doc):
    lo, hi, h, q = relative_value_iteration(doc)
    gain = (lo + hi) / 2
    pick = {n: max(row, key=row.get) for n, row in q.items() if row}
    # Promises: the shop prints on a new press and does not print on a poor one when busy.
    assert pick[press_name("new", "busy")] == "print", pick
    assert pick[press_name("poor", "busy")] != "print", pick
    can_print = {s["name"] for s in doc["states"]
                 if any(sa["action"] == "print" for sa in s.get("actions", []))}
    upkeep = sorted(n for n, a in pick.items() if a != "print" and n in can_print)
    doc["description"] = (
        "A print shop runs one offset press and judges its upkeep by the long-run profit per "
        "working day (the average criterion: no discount, no end date). Each morning the press "
        "is in one of five conditions (new, good, fair, poor, broken) and the order book is "
        "quiet or busy (a quiet day is followed by a quiet one with probability 0.7, a busy day "
        "by a busy one with probability 0.6). The shop can 'print' all day (a full day's work "
        "earns 400 EUR when quiet and 900 EUR when busy, times the print quality: 1 new, 0.95 "
        "good, 0.8 fair, 0.55 poor; the press wears and may break), 'clean' it (60 EUR of "
        "supplies and half a day's printing; it usually comes back a level better), "
        "'overhaul' it (500 EUR, no printing, back to new) or, once it is broken, 'repair' it "
        "(300 EUR, no printing, back to good or fair). Every state can be reached from every "
        "other, so the optimal gain is one number for the whole shop: about %.2f EUR per day. "
        "Where the press could print, the optimal policy looks after it instead in %s. The "
        "values of a solution are biases relative to new_quiet: how much more (or less) a day "
        "that starts in a state earns in total, over the long run, than one that starts in "
        "new_quiet."
        % (gain, ", ".join(upkeep)))
    return ["press: gain in [%.9f, %.9f]; upkeep in %s" % (lo, hi, upkeep)]


# --------------------------------------------------------------------------------------------
# Delivery drone returning to its charging pad (total cost, minimize Wh).

DRONE_ROWS, DRONE_COLS = 5, 6
DRONE_BUILDINGS = {(1, 1), (2, 4), (3, 1)}
DRONE_PAD = (4, 2)
DRONE_NET = (1, 3)            # a bird net over an orchard: a drone caught there stays
DRONE_INTENDED, DRONE_GUST = D("0.75"), D("0.25")
DRONE_MOVE_COST = D("1")      # Wh per move
DRONE_UPWIND_COST = D("1.5")  # Wh for a move west, into the prevailing wind
DRONE_TIES = ["r2c3", "r3c3", "r3c4"]   # 'south' and 'west' are exactly tied there


def drone_free(r, c):
    return 0 <= r < DRONE_ROWS and 0 <= c < DRONE_COLS and (r, c) not in DRONE_BUILDINGS


def drone_model():
    states = []
    for r in range(DRONE_ROWS):
        for c in range(DRONE_COLS):
            if (r, c) in DRONE_BUILDINGS:
                continue
            name = cell_name(r, c)
            if (r, c) == DRONE_PAD:
                states.append({"name": name, "description": "The charging pad: the flight ends.",
                               "terminal": True})
                continue
            if (r, c) == DRONE_NET:
                states.append({"name": name,
                               "description": "Caught in the orchard's bird net: the drone can "
                                              "only wait to be fetched at the end of the day.",
                               "actions": [state_action("wait", make_outcomes(
                                   [(name, D(1), D(0))]))]})
                continue
            actions = []
            for move in ["north", "south", "west", "east"]:
                dr, dc = MOVES[move]
                land = (r + dr, c + dc) if drone_free(r + dr, c + dc) else (r, c)
                gust = (land[0], land[1] + 1) if drone_free(land[0], land[1] + 1) else land
                if land in (DRONE_PAD, DRONE_NET):
                    gust = land  # landed (or caught) before the gust
                pairs = [(cell_name(*land), DRONE_INTENDED, D(0)),
                         (cell_name(*gust), DRONE_GUST, D(0))]
                cost = DRONE_UPWIND_COST if move == "west" else DRONE_MOVE_COST
                actions.append(state_action(move, make_outcomes(pairs), cost))
            states.append({"name": name, "actions": actions})
    picture = []
    for r in range(DRONE_ROWS):
        picture.append("".join("#" if (r, c) in DRONE_BUILDINGS else
                               "P" if (r, c) == DRONE_PAD else
                               "N" if (r, c) == DRONE_NET else "." for c in range(DRONE_COLS)))
    return {
        "format": "mdpserve/model@1",
        "name": "Delivery drone returning to its charging pad",
        "description": "\n".join(picture),  # replaced by drone_describe
        "reward_unit": "Wh",
        "objective": "minimize",
        "criterion": {"kind": "total"},
        "actions": ["north", "south", "west", "east", "wait"],
        "states": states,
    }


def drone_describe(doc):
    V, Q, steps = total_reward(doc)
    net = cell_name(*DRONE_NET)
    stuck = sorted(n for n, v in V.items() if v is None)
    assert stuck == [net], stuck
    unsafe = sorted("%s %s" % (n, a) for n, row in Q.items() for a, q in row.items()
                    if q is None and n != net)
    # Promises: next to the net some moves are unsafe, yet every other cell can get home.
    assert "r1c2 east" in unsafe and "r0c3 south" in unsafe, unsafe
    for state in DRONE_TIES:
        row = sorted((q, a) for a, q in Q[state].items() if q is not None)
        assert {row[0][1], row[1][1]} == {"south", "west"}, (state, row)
        assert abs(row[0][0] - row[1][0]) < 1e-12 and row[2][0] - row[1][0] > 0.1, (state, row)
    start = cell_name(0, 0)
    picture = doc["description"].split("\n")
    doc["description"] = (
        "A delivery drone over a %d-row, %d-column block of a small town flies back to its "
        "charging pad, one cell per move. Cells are named rRcC (row R from the north, column C "
        "from the west). Map, northern row first ('#' a tall building, 'P' the pad, 'N' the "
        "bird net over an orchard): %s. A move north, south, west or east lands on the "
        "intended cell (or stays put in front of a building or the edge of the map); then, "
        "with probability 0.25, a gust of the prevailing west wind pushes it one more cell "
        "east, unless a building or the edge is in the way. A drone that lands on the pad or "
        "in the net is not pushed on. Each move costs %s Wh of battery, %s Wh when flying west "
        "into the wind; the criterion is the total energy until the pad (terminal) is reached. "
        "The net is a trap: a drone caught there can only 'wait' and never reaches the pad, so "
        "it has no value, and any move that can end in the net (%d of them, for example east "
        "from r1c2 and south from r0c3) is unsafe: its q is null and it is never chosen, "
        "because a plan that reaches the pad with certainty must avoid it. From r0c0 the "
        "drone needs about %.2f Wh and %.2f moves on average. Exact ties: in %s, flying "
        "'south' and flying 'west' cost the same in expectation (a gust can blow the cheaper "
        "move south further east, away from the pad, while it at worst sets the dearer move "
        "west back where it started), so both are optimal."
        % (DRONE_ROWS, DRONE_COLS, " / ".join(picture), DRONE_MOVE_COST, DRONE_UPWIND_COST,
           len(unsafe), V[start], steps[start], ", ".join(DRONE_TIES)))
    return ["drone: only %s cannot reach the pad; %d unsafe moves; V(%s) %.6f, steps %.6f"
            % (net, len(unsafe), start, V[start], steps[start])]


# --------------------------------------------------------------------------------------------

def build():
    pump = pump_model()
    robot = robot_model()
    bakery = bakery_model()
    ice = ice_model()
    press = press_model()
    drone = drone_model()
    notes = (check_pump(pump) + check_robot(robot) + bakery_describe(bakery) +
             ice_describe(ice) + press_describe(press) + drone_describe(drone))
    return {"pump-maintenance.json": pump, "warehouse-robot.json": robot,
            "bakery-reorder.json": bakery, "icecream-stocking.json": ice,
            "press-upkeep.json": press, "drone-delivery.json": drone}, notes


def main():
    here = os.path.dirname(os.path.abspath(__file__))
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--root", default=os.path.dirname(here), help="repository root")
    ap.add_argument("--check", action="store_true",
                    help="compare with the files on disk instead of writing them")
    args = ap.parse_args()
    outdir = os.path.join(args.root, "api-schema", "examples")
    docs, notes = build()
    for n in notes:
        print(n)
    differ = 0
    os.makedirs(outdir, exist_ok=True)
    for fname, doc in docs.items():
        text = json.dumps(doc, indent=2, ensure_ascii=False) + "\n"
        path = os.path.join(outdir, fname)
        nstates = len(doc["states"])
        assert 8 <= nstates <= 40, (fname, nstates)
        if args.check:
            old = open(path, encoding="utf-8").read() if os.path.exists(path) else None
            status = "same" if old == text else "DIFFERS"
            differ += old != text
            print("%s: %s" % (path, status))
        else:
            with open(path, "w", encoding="utf-8") as f:
                f.write(text)
            print("wrote %s (%d states)" % (path, nstates))
    return 1 if differ else 0


if __name__ == "__main__":
    sys.exit(main())
