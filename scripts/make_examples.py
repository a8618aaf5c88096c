#!/usr/bin/python3
"""Generate the demo model documents in api-schema/examples/.

Run from anywhere with /usr/bin/python3:

    /usr/bin/python3 scripts/make_examples.py [--root REPO] [--check]

The three scenarios are invented for mdpserve's documentation and tests:

* pump-maintenance.json  (minimize) - a process pump that wears out over the weeks,
* warehouse-robot.json   (maximize) - a robot driving to its charging dock on a small grid,
* bakery-reorder.json    (maximize) - a bakery deciding how many loaves to order each morning.

All probabilities and money amounts are computed in decimal arithmetic, so that every number
is written as a short literal (0.765, not 0.7650000000000001) and the probabilities of every
state action sum to exactly 1 in decimal. A small value iteration in this script checks the
ties and near-ties that the model descriptions promise, so that a change of parameters that
breaks a promise fails here instead of going unnoticed.

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

def build():
    pump = pump_model()
    robot = robot_model()
    bakery = bakery_model()
    notes = check_pump(pump) + check_robot(robot) + bakery_describe(bakery)
    return {"pump-maintenance.json": pump, "warehouse-robot.json": robot,
            "bakery-reorder.json": bakery}, notes


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
