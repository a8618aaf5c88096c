#!/usr/bin/python3
"""Checks of mdpserve's JSON Schemas, demo models and (optionally) the CLI's documents.

    /usr/bin/python3 tests/schema/check_schemas.py --root REPO [--mdpserve PATH_TO_BINARY]

Without --mdpserve it checks:
  (a) every api-schema/*.schema.json is a valid JSON Schema 2020-12 document, with the
      expected $id, a title and a description on every property;
  (b) every api-schema/examples/*.json validates against model.schema.json and obeys the
      cross-reference rules that the schema cannot express (a small reference check here,
      criterion rules included);
  (c) a table of deliberately bad model documents is REJECTED by model.schema.json, with an
      error located at or under the expected JSON Pointer; a table of unusual but valid models
      is accepted; models that only the decoder can reject (cross-references) are accepted by
      the schema, which documents the schema's limits; sample input and output documents are
      accepted or rejected by the other schemas as the README says.
With --mdpserve it also runs the CLI:
  (d) `solve EXAMPLE --out TMP` (exit 0) must write a solution document valid against
      solution.schema.json and consistent with the model; `verify EXAMPLE --values TMP` and
      `verify EXAMPLE --policy TMP` (exit 0 = pass, 1 = fail) must print verification
      documents; `evaluate EXAMPLE --policy TMP` (exit 0) an evaluation document; `validate
      EXAMPLE` (exit 0) an errors document without errors; `simulate EXAMPLE --solution TMP
      --start-distribution START` (exit 0) a simulation document whose mean agrees with the
      exact V^pi of `evaluate` within its 99.9% interval, reproduced exactly by a rerun.
      For the examples of the other criteria (finite_horizon, average, total) the same
      commands run under the criterion, every output validated against its schema: the
      solution document is accepted as a values and a policy candidate; `verify --values
      SOLUTION` passes (exit 0) with the criterion's numbers (a gain bracket containing the
      gain no wider than the tolerance; a zero distance to the reference, null residuals
      exactly at the states that cannot reach a goal), and fails (exit 1) once one value is
      raised by 1; `verify --policy SOLUTION` passes (exit 0) for average and total, and for
      a finite horizon, where the solution's stage-0 picks are applied at every stage, its
      loss equals the one computed here from V^pi_0 and the verdict follows from it (the
      icecream example fails: the optimal order changes with the weeks left; a one-period
      variant must pass); `evaluate --policy SOLUTION` equals the solution's values within
      1e-6 (total, with its expected steps and the states left out listed as improper; a
      finite horizon: V^pi_0 computed here), its gains equal the solution's gain within the
      solution's gain_error_bound + 1e-9 (average, with the same recurrent classes and a bias
      off by a constant); `simulate` (20000 seeded episodes, the solution's own decisions,
      per stage for a finite horizon) has a 99.9% interval containing the solution's value
      of the start (finite horizon, total) or, with --max-steps 2000, its gain within the
      interval plus 2 max|h| / 2000 (average), reproduced by a rerun; under total reward a
      policy that stays for ever in a state that can reach a goal fails `verify --policy`
      (exit 1) listing that state in improper_states with a null loss, and `evaluate` lists
      it as improper. The solution document is also checked
      against the reference solvers of scripts/make_examples.py (plain Python): finite
      horizon, values and Q of stage 0 and of `solve --stage 3` against backward induction;
      average, the gain bracket and the bias against relative value iteration, a
      `relative_value_iteration` solve too, and `--method value_iteration` refused (exit 2)
      naming the methods that apply; total, values, unsafe (null) Q, the goal-reaching set
      and the expected steps of the chosen policy. A total-reward model with a loop that
      earns reward must be refused at solve time (exit 2, the loop named), its cost-minimising
      twin solved; `--stage` on a model of another criterion refused. Every bad model must be
      refused by `validate` (non-zero exit, errors document with an error at the expected
      pointer) and by `solve` (non-zero exit, `POINTER: message` lines on stderr); valid and
      warning-only models must be accepted by `validate` (exit 0, no errors).

Always, and with --mdpserve also through `validate`:
  (e) every example converted by scripts/model_to_arrays.py to the compact encoding validates
      against model-arrays.schema.json (and not against model.schema.json) and is accepted by
      `validate` (exit 0, no errors); a table of mangled arrays documents is rejected by the
      schema with an error at or under the expected pointer and by `validate` (non-zero exit,
      an error at or under the expected pointer); the mangled documents whose error JSON
      Schema cannot express (lengths, index ranges, order, sums) are accepted by the schema
      and rejected by `validate`.

Prints one line per check and ends with `N passed, M failed`; exits 1 when anything failed.
Uses only the standard library, jsonschema and the reference solvers of
scripts/make_examples.py.
"""

import argparse
import copy
import glob
import importlib.util
import json
import math
import os
import re
import subprocess
import sys
import tempfile

import jsonschema
from jsonschema import Draft202012Validator

SCHEMA_BASE = "https://mdpserve.invalid/schema/"
SCHEMA_FILES = [
    "model.schema.json", "values.schema.json", "policy.schema.json", "solution.schema.json",
    "verification.schema.json", "evaluation.schema.json", "errors.schema.json",
    "start.schema.json", "simulation.schema.json", "model-arrays.schema.json",
]
CLI_TIMEOUT = 600  # seconds per CLI run

# Ties the demo descriptions promise (state -> actions that must all be optimal).
EXPECTED_TIES = {
    "pump-maintenance.json": {"failed_peak": {"service", "replace"},
                              "failed_off": {"service", "replace"}},
    "warehouse-robot.json": {"r0c2": {"west", "east"}},
    "drone-delivery.json": {"r2c3": {"south", "west"}, "r3c3": {"south", "west"},
                            "r3c4": {"south", "west"}},
}


# --------------------------------------------------------------------------------------------
# Reporting

class Report:
    def __init__(self):
        self.passed = 0
        self.failed = 0

    def check(self, name, ok, detail="", info=""):
        """Counts and prints one check; `detail` explains a failure, `info` annotates a pass."""
        if ok:
            self.passed += 1
            print("PASS %s%s" % (name, (" (%s)" % info) if info else ""))
        else:
            self.failed += 1
            print("FAIL %s%s" % (name, (": %s" % detail) if detail else ""))
        sys.stdout.flush()
        return ok


def pointer_of(path):
    """RFC 6901 pointer from a sequence of keys and indices."""
    return "".join("/" + str(p).replace("~", "~0").replace("/", "~1") for p in path)


def within(pointer, expected):
    """True when `pointer` designates `expected` or something inside it."""
    return expected == "" or pointer == expected or pointer.startswith(expected + "/")


# --------------------------------------------------------------------------------------------
# Schemas

class Schemas:
    """Loads the schema set and makes validators that resolve references between the files
    without any network access."""

    def __init__(self, schema_dir):
        self.by_file = {}
        for f in SCHEMA_FILES:
            with open(os.path.join(schema_dir, f), encoding="utf-8") as fh:
                self.by_file[f] = json.load(fh)
        self.by_id = {s.get("$id", f): s for f, s in self.by_file.items()}
        self._validators = {}

    def validator(self, fname):
        if fname in self._validators:
            return self._validators[fname]
        schema = self.by_file[fname]
        v = None
        try:
            from referencing import Registry, Resource  # jsonschema >= 4.18
            from referencing.jsonschema import DRAFT202012
            registry = Registry().with_resources(
                (sid, Resource.from_contents(s, default_specification=DRAFT202012))
                for sid, s in self.by_id.items())
            v = Draft202012Validator(schema, registry=registry)
        except ImportError:
            resolver = jsonschema.RefResolver(
                base_uri=schema.get("$id", ""), referrer=schema, store=dict(self.by_id))
            v = Draft202012Validator(schema, resolver=resolver)
        self._validators[fname] = v
        return v

    def errors(self, fname, instance):
        """All validation errors as (pointer, message) pairs."""
        return [(pointer_of(e.absolute_path), e.message)
                for e in self.validator(fname).iter_errors(instance)]


def missing_descriptions(schema, where="#"):
    """Pointers to property and $defs subschemas that lack a description. if/then/else branches
    only refine constraints and are not walked."""
    out = []
    if not isinstance(schema, dict):
        return out
    for key in ("properties", "$defs"):
        for name, sub in schema.get(key, {}).items():
            here = "%s/%s/%s" % (where, key, name)
            if isinstance(sub, dict) and not sub.get("description"):
                out.append(here)
            out.extend(missing_descriptions(sub, here))
    for key in ("items", "additionalProperties"):
        sub = schema.get(key)
        if isinstance(sub, dict):
            here = "%s/%s" % (where, key)
            if key == "additionalProperties" and not sub.get("description"):
                out.append(here)
            out.extend(missing_descriptions(sub, here))
    for key in ("allOf", "oneOf", "anyOf"):
        for i, sub in enumerate(schema.get(key, [])):
            out.extend(missing_descriptions(sub, "%s/%s/%d" % (where, key, i)))
    return out


# --------------------------------------------------------------------------------------------
# A reference check of the model rules that JSON Schema cannot express (used on the examples
# and to make sure the decoder-only bad cases really break a rule).

def cross_reference_problems(doc):
    problems = []
    states = doc.get("states", [])
    names = [s.get("name") for s in states]
    seen = set()
    for i, n in enumerate(names):
        if n in seen:
            problems.append(("/states/%d/name" % i, "duplicate state name %r" % n))
        seen.add(n)
    catalogue = set(doc.get("actions", []))
    for i, s in enumerate(states):
        used = set()
        for j, sa in enumerate(s.get("actions", [])):
            p = "/states/%d/actions/%d" % (i, j)
            a = sa.get("action")
            if a not in catalogue:
                problems.append((p + "/action", "action %r not in the catalogue" % a))
            if a in used:
                problems.append((p + "/action", "action %r used twice in one state" % a))
            used.add(a)
            total = 0.0
            for k, o in enumerate(sa.get("outcomes", [])):
                if o.get("next") not in seen:
                    problems.append(("%s/outcomes/%d/next" % (p, k), "unknown next state"))
                for field in ("probability", "reward"):
                    if field in o and not math.isfinite(o[field]):
                        problems.append(("%s/outcomes/%d/%s" % (p, k, field), "not finite"))
                total += o.get("probability", 0.0)
            if "reward" in sa and not math.isfinite(sa["reward"]):
                problems.append((p + "/reward", "not finite"))
            if abs(total - 1.0) > 1e-6:
                problems.append((p + "/outcomes", "probabilities sum to %r" % total))
    problems.extend(criterion_problems(doc, seen))
    return problems


def criterion_problems(doc, names):
    """The criterion rules the schema cannot express (see model.schema.json)."""
    problems = []
    c = doc.get("criterion", {})
    states = doc.get("states", [])
    terminal = {s.get("name") for s in states if s.get("terminal", False)}
    if c.get("kind") == "finite_horizon":
        h = c.get("horizon")
        if isinstance(h, (int, float)) and (h + 1) * len(states) > 2 ** 28:
            problems.append(("/criterion/horizon", "(horizon + 1) x states over 2^28"))
        values = c.get("terminal_values", {})
        for name, v in (values.items() if isinstance(values, dict) else []):
            p = "/criterion/terminal_values/" + pointer_of([name])[1:]
            if name not in names:
                problems.append((p, "terminal value for an unknown state"))
            elif isinstance(v, (int, float)) and not math.isfinite(v):
                problems.append((p, "terminal value not finite"))
            elif v != 0 and name in terminal:
                problems.append((p, "non-zero terminal value at a terminal state"))
    if c.get("kind") == "total" and states and not terminal:
        problems.append(("/criterion", "total criterion without a terminal (goal) state"))
    return problems


def warning_sources(doc):
    """Pointers the decoder should warn about: states no other state leads to, unused catalogue
    actions, zero-probability outcomes."""
    warnings = []
    led_to, used = set(), set()
    for i, s in enumerate(doc["states"]):
        for j, sa in enumerate(s.get("actions", [])):
            used.add(sa["action"])
            for k, o in enumerate(sa["outcomes"]):
                if o["next"] != s["name"]:
                    led_to.add(o["next"])
                if o["probability"] == 0:
                    warnings.append("/states/%d/actions/%d/outcomes/%d" % (i, j, k))
    for i, s in enumerate(doc["states"]):
        if s["name"] not in led_to:
            warnings.append("/states/%d" % i)
    for i, a in enumerate(doc["actions"]):
        if a not in used:
            warnings.append("/actions/%d" % i)
    return warnings


# --------------------------------------------------------------------------------------------
# Test documents

BASE_MODEL = {
    "format": "mdpserve/model@1",
    "name": "Schema check base model",
    "objective": "maximize",
    "criterion": {"kind": "discounted", "discount": 0.9},
    "actions": ["stay", "go"],
    "states": [
        {"name": "a",
         "actions": [
             {"action": "stay", "reward": 1.0,
              "outcomes": [{"next": "a", "probability": 0.5},
                           {"next": "b", "probability": 0.5, "reward": 2.0}]},
             {"action": "go",
              "outcomes": [{"next": "c", "probability": 1.0, "reward": 3.0}]}]},
        {"name": "b",
         "actions": [
             {"action": "stay", "outcomes": [{"next": "a", "probability": 1.0}]},
             {"action": "go", "outcomes": [{"next": "c", "probability": 1.0}]}]},
        {"name": "c", "terminal": True},
    ],
}
OUT0 = "/states/0/actions/0/outcomes/0"


def variant(change):
    doc = copy.deepcopy(BASE_MODEL)
    result = change(doc)
    return doc if result is None else result


def _set(path, value):
    def change(doc):
        target = doc
        for p in path[:-1]:
            target = target[p]
        target[path[-1]] = value
    return change


def _del(path):
    def change(doc):
        target = doc
        for p in path[:-1]:
            target = target[p]
        del target[path[-1]]
    return change


def fh(**members):
    """A finite-horizon criterion: horizon 4 unless given, plus `members`."""
    c = {"kind": "finite_horizon", "horizon": 4}
    c.update(members)
    return c


def _without_goal(doc):
    """No terminal state: c loops on itself."""
    doc["states"][2] = {"name": "c", "actions": [
        {"action": "stay", "outcomes": [{"next": "c", "probability": 1.0}]}]}


def _many_states(count):
    """BASE_MODEL with `count` extra states x0, x1, ... that each lead to c."""
    def change(doc):
        for i in range(count):
            doc["states"].append({"name": "x%d" % i, "actions": [
                {"action": "go", "outcomes": [{"next": "c", "probability": 1.0}]}]})
    return change


def _rename_probability(doc):
    o = doc["states"][0]["actions"][0]["outcomes"][0]
    o["probabilty"] = o.pop("probability")


# (label, document, expected pointer): the schema must reject, with an error at or under the
# pointer. The decoder must reject them too.
SCHEMA_BAD = [
    ("missing name", variant(_del(["name"])), ""),
    ("empty model name", variant(_set(["name"], "")), "/name"),
    ("missing format", variant(_del(["format"])), ""),
    ("unknown format version", variant(_set(["format"], "mdpserve/model@2")), "/format"),
    ("objective misspelt", variant(_set(["objective"], "maximise")), "/objective"),
    ("discount 1.0", variant(_set(["criterion", "discount"], 1.0)), "/criterion/discount"),
    ("discount -0.1", variant(_set(["criterion", "discount"], -0.1)), "/criterion/discount"),
    ("discount as string", variant(_set(["criterion", "discount"], "0.9")),
     "/criterion/discount"),
    ("discount missing", variant(_del(["criterion", "discount"])), "/criterion"),
    ("unknown criterion kind", variant(_set(["criterion"], {"kind": "undiscounted"})),
     "/criterion"),
    ("average criterion with a discount",
     variant(_set(["criterion"], {"kind": "average", "discount": 0.9})), "/criterion"),
    ("total criterion with a horizon",
     variant(_set(["criterion"], {"kind": "total", "horizon": 10})), "/criterion"),
    ("total criterion with a discount",
     variant(_set(["criterion"], {"kind": "total", "discount": 0.9})), "/criterion"),
    ("criterion kind Average (capitalised)", variant(_set(["criterion"], {"kind": "Average"})),
     "/criterion"),
    ("finite_horizon without horizon",
     variant(_set(["criterion"], {"kind": "finite_horizon"})), "/criterion"),
    ("finite_horizon horizon 0", variant(_set(["criterion"], fh(horizon=0))),
     "/criterion/horizon"),
    ("finite_horizon horizon 2.5", variant(_set(["criterion"], fh(horizon=2.5))),
     "/criterion/horizon"),
    ("finite_horizon horizon 1000001", variant(_set(["criterion"], fh(horizon=1000001))),
     "/criterion/horizon"),
    ("finite_horizon horizon as string", variant(_set(["criterion"], fh(horizon="12"))),
     "/criterion/horizon"),
    ("finite_horizon discount 1.5", variant(_set(["criterion"], fh(discount=1.5))),
     "/criterion/discount"),
    ("finite_horizon discount -0.5", variant(_set(["criterion"], fh(discount=-0.5))),
     "/criterion/discount"),
    ("finite_horizon terminal_values as array",
     variant(_set(["criterion"], fh(terminal_values=[1.0, 2.0]))), "/criterion/terminal_values"),
    ("finite_horizon terminal value as string",
     variant(_set(["criterion"], fh(terminal_values={"a": "3"}))),
     "/criterion/terminal_values/a"),
    ("finite_horizon terminal value null",
     variant(_set(["criterion"], fh(terminal_values={"b": None}))),
     "/criterion/terminal_values/b"),
    ("finite_horizon with an unknown member (salvage)",
     variant(_set(["criterion"], fh(salvage={"a": 1.0}))), "/criterion"),
    ("criterion without kind", variant(_set(["criterion"], {"discount": 0.9})), "/criterion"),
    ("discounted criterion with extra field",
     variant(_set(["criterion", "horizon"], 5)), "/criterion"),
    ("probability -0.2",
     variant(_set(["states", 0, "actions", 0, "outcomes", 0, "probability"], -0.2)),
     OUT0 + "/probability"),
    ("probability 1.5",
     variant(_set(["states", 0, "actions", 0, "outcomes", 0, "probability"], 1.5)),
     OUT0 + "/probability"),
    ("probability as string",
     variant(_set(["states", 0, "actions", 0, "outcomes", 0, "probability"], "0.5")),
     OUT0 + "/probability"),
    ("unknown field probabilty (misspelt)", variant(_rename_probability), OUT0),
    ("outcome without next", variant(_del(["states", 0, "actions", 0, "outcomes", 0, "next"])),
     OUT0),
    ("next is a number",
     variant(_set(["states", 0, "actions", 0, "outcomes", 0, "next"], 1)), OUT0 + "/next"),
    ("outcome reward as string",
     variant(_set(["states", 0, "actions", 0, "outcomes", 1, "reward"], "2")),
     "/states/0/actions/0/outcomes/1/reward"),
    ("state action reward null",
     variant(_set(["states", 0, "actions", 0, "reward"], None)), "/states/0/actions/0/reward"),
    ("empty outcomes", variant(_set(["states", 0, "actions", 1, "outcomes"], [])),
     "/states/0/actions/1/outcomes"),
    ("state action without action name",
     variant(_del(["states", 0, "actions", 1, "action"])), "/states/0/actions/1"),
    ("unknown field in state action",
     variant(_set(["states", 0, "actions", 1, "probability"], 1.0)), "/states/0/actions/1"),
    ("empty states", variant(_set(["states"], [])), "/states"),
    ("states is an object", variant(_set(["states"], {"a": {}})), "/states"),
    ("empty action catalogue", variant(_set(["actions"], [])), "/actions"),
    ("duplicate catalogue action", variant(_set(["actions"], ["stay", "go", "stay"])),
     "/actions"),
    ("catalogue action not a string", variant(_set(["actions"], ["stay", 7])), "/actions/1"),
    ("terminal with string value", variant(_set(["states", 2, "terminal"], "yes")),
     "/states/2"),
    ("terminal state with actions",
     variant(_set(["states", 2, "actions"],
                  [{"action": "stay", "outcomes": [{"next": "c", "probability": 1.0}]}])),
     "/states/2/actions"),
    ("non-terminal state without actions", variant(_del(["states", 1, "actions"])),
     "/states/1"),
    ("non-terminal state with empty actions", variant(_set(["states", 1, "actions"], [])),
     "/states/1/actions"),
    ("explicitly non-terminal state without actions",
     variant(lambda d: d["states"].__setitem__(2, {"name": "c", "terminal": False})),
     "/states/2"),
    ("state without name", variant(_del(["states", 1, "name"])), "/states/1"),
    ("state name of 257 characters", variant(_set(["states", 2, "name"], "x" * 257)),
     "/states/2/name"),
    ("state name with a newline", variant(_set(["states", 2, "name"], "c\n")),
     "/states/2/name"),
    ("action name with a tab", variant(_set(["actions", 1], "go\tnow")), "/actions/1"),
    ("empty state name", variant(_set(["states", 2, "name"], "")), "/states/2/name"),
    ("unknown field in state", variant(_set(["states", 1, "reward"], 1.0)), "/states/1"),
    ("unknown top-level field", variant(_set(["horizon"], 10)), ""),
    ("description too long", variant(_set(["description"], "d" * 10001)), "/description"),
    ("reward_unit too long", variant(_set(["reward_unit"], "u" * 65)), "/reward_unit"),
    ("document is an array", [copy.deepcopy(BASE_MODEL)], ""),
]

# (label, document): unusual but valid models; the schema and the decoder must accept them.
SCHEMA_GOOD = [
    ("base model", copy.deepcopy(BASE_MODEL)),
    ("discount 0", variant(_set(["criterion", "discount"], 0))),
    ("discount 0.999999", variant(_set(["criterion", "discount"], 0.999999))),
    ("integer probability 1", variant(_set(["states", 1, "actions", 0, "outcomes", 0,
                                            "probability"], 1))),
    ("terminal with empty actions", variant(_set(["states", 2, "actions"], []))),
    ("explicit terminal false", variant(_set(["states", 0, "terminal"], False))),
    ("metadata present",
     variant(lambda d: d.update({"description": "free text\nwith lines", "reward_unit": "EUR"}))),
    ("minimize objective, negative rewards",
     variant(lambda d: (d.update({"objective": "minimize"}),
                        d["states"][0]["actions"][0].update({"reward": -4}))[-1])),
    ("same next twice with different rewards",
     variant(_set(["states", 1, "actions", 0, "outcomes"],
                  [{"next": "a", "probability": 0.25, "reward": 1.0},
                   {"next": "a", "probability": 0.75, "reward": -1.0}]))),
    ("probabilities summing to 1 within 1e-6",
     variant(_set(["states", 0, "actions", 0, "outcomes"],
                  [{"next": "a", "probability": 0.5000004},
                   {"next": "b", "probability": 0.5, "reward": 2.0}]))),
    ("names with spaces, punctuation and non-ASCII letters",
     variant(lambda d: json.loads(json.dumps(d).replace('"a"', '"K\\u00fchlraum \\u2192 Tor 3"')
                                  .replace('"go"', '"go (fast), then \\"stop\\""')))),
    ("state name of 256 characters",
     variant(lambda d: json.loads(json.dumps(d).replace('"b"', json.dumps("b" * 256))))),
    ("average criterion", variant(_set(["criterion"], {"kind": "average"}))),
    ("total criterion (c is the goal)", variant(_set(["criterion"], {"kind": "total"}))),
    ("finite_horizon with the horizon only", variant(_set(["criterion"], fh(horizon=12)))),
    ("finite_horizon horizon 12.0 (zero fraction)",
     variant(_set(["criterion"], fh(horizon=12.0)))),
    ("finite_horizon with discount and terminal values",
     variant(_set(["criterion"], fh(discount=0.95, terminal_values={"a": 2.5, "b": -1})))),
    ("finite_horizon at its limits (horizon 1000000, discount 1, no terminal values)",
     variant(_set(["criterion"], fh(horizon=1000000, discount=1, terminal_values={})))),
    ("finite_horizon discount 0, horizon 1, terminal value 0 at the terminal state",
     variant(_set(["criterion"], fh(horizon=1, discount=0, terminal_values={"c": 0})))),
]

# (label, JSON text, expected pointer): models the schema accepts (or cannot parse) but the
# decoder must reject: rules JSON Schema cannot express, and malformed JSON.
DECODER_BAD = [
    ("duplicate state names",
     json.dumps(variant(lambda d: d["states"].append(copy.deepcopy(d["states"][1])))),
     "/states/3"),
    ("action used twice in one state",
     json.dumps(variant(_set(["states", 0, "actions", 1, "action"], "stay"))),
     "/states/0/actions/1"),
    ("action not in the catalogue",
     json.dumps(variant(_set(["states", 0, "actions", 1, "action"], "jump"))),
     "/states/0/actions/1"),
    ("next names no state",
     json.dumps(variant(_set(["states", 0, "actions", 0, "outcomes", 0, "next"], "z"))), OUT0),
    ("probabilities summing to 0.9",
     json.dumps(variant(_set(["states", 0, "actions", 0, "outcomes", 0, "probability"], 0.4))),
     "/states/0/actions/0"),
    ("probabilities summing to 1.00001",
     json.dumps(variant(_set(["states", 0, "actions", 0, "outcomes", 0, "probability"],
                             0.50001))), "/states/0/actions/0"),
    ("reward 1e999 (overflows)",
     json.dumps(variant(_set(["states", 0, "actions", 0, "reward"], 123.5))).replace(
         "123.5", "1e999"), "/states/0/actions/0/reward"),
    ("outcome reward -1e999 (overflows)",
     json.dumps(variant(_set(["states", 0, "actions", 0, "outcomes", 1, "reward"], 123.5)))
     .replace("123.5", "-1e999"), "/states/0/actions/0/outcomes/1/reward"),
    ("duplicate key in an object",
     json.dumps(BASE_MODEL).replace('"name": "a", ', '"name": "a", "name": "a2", ', 1),
     "/states/0"),
    ("terminal value for an unknown state",
     json.dumps(variant(_set(["criterion"], fh(terminal_values={"a": 1.0, "zz": 2.0})))),
     "/criterion/terminal_values/zz"),
    ("non-zero terminal value at a terminal state",
     json.dumps(variant(_set(["criterion"], fh(terminal_values={"c": 5.0})))),
     "/criterion/terminal_values/c"),
    ("terminal value 1e999 (overflows)",
     json.dumps(variant(_set(["criterion"], fh(terminal_values={"a": 123.5})))).replace(
         "123.5", "1e999"), "/criterion/terminal_values/a"),
    ("total criterion without any terminal state",
     json.dumps(variant(lambda d: (_without_goal(d), d["criterion"].clear(),
                                   d["criterion"].update(kind="total")) and None)),
     "/criterion"),
    ("finite_horizon: (horizon + 1) x states over 2^28 (1000000 periods, 269 states)",
     json.dumps(variant(lambda d: (_many_states(266)(d),
                                   d.update(criterion=fh(horizon=1000000))) and None)),
     "/criterion/horizon"),
    ("malformed JSON (trailing comma)", json.dumps(BASE_MODEL)[:-1] + ",}", ""),
    ("malformed JSON (truncated)", json.dumps(BASE_MODEL)[:40], ""),
    ("empty input", "", ""),
]

# (label, document, expected warning pointer): valid models that draw a warning.
WARNING_MODELS = [
    ("state no other state leads to",
     variant(lambda d: d["states"].insert(2, {
         "name": "island", "actions": [
             {"action": "go", "outcomes": [{"next": "c", "probability": 1.0}]}]})),
     "/states/2"),
    ("catalogue action no state uses", variant(_set(["actions"], ["stay", "go", "idle"])),
     "/actions/2"),
    ("outcome with probability 0",
     variant(lambda d: d["states"][1]["actions"][0]["outcomes"].append(
         {"next": "b", "probability": 0.0})), "/states/1/actions/0/outcomes/1"),
]


def sample_solution():
    return {
        "format": "mdpserve/solution@1",
        "model": {"name": BASE_MODEL["name"], "states": 3, "actions": 2, "state_actions": 4,
                  "outcomes": 5},
        "objective": "maximize",
        "criterion": {"kind": "discounted", "discount": 0.9},
        "method": "value_iteration",
        "options": {"tolerance": 1e-9, "max_iterations": 100000, "time_limit_seconds": None,
                    "tie_tolerance": 1e-9},
        "outcome": "converged",
        "iterations": 212, "sweeps": 212,
        "residual": 8.1e-10, "value_error_bound": 7.3e-9, "q_error_bound": 7.3e-9,
        "policy_loss_bound": 1.5e-8, "tie_tolerance": 1e-9, "solve_seconds": 0.0003,
        "tied_states": 1,
        "smallest_gaps": [{"state": "b", "gap": 0.0}, {"state": "a", "gap": 0.27}],
        "values": {"a": 3.27, "b": 3.0, "c": 0.0},
        "policy": {"a": "stay", "b": "stay"},
        "states": [
            {"state": "a", "terminal": False, "value": 3.27, "action": "stay",
             "optimal_actions": ["stay"], "action_gap": 0.27, "q": {"stay": 3.27, "go": 3.0}},
            {"state": "b", "terminal": False, "value": 3.0, "action": "stay",
             "optimal_actions": ["stay", "go"], "action_gap": 0.0,
             "q": {"stay": 3.0, "go": 3.0}},
            {"state": "c", "terminal": True, "value": 0.0, "action": None,
             "optimal_actions": [], "action_gap": None, "q": {}},
        ],
    }


def sample_average_solution():
    """An average-reward solution: values are biases (0 at the reference state)."""
    doc = sample_solution()
    doc.update(criterion={"kind": "average"}, method="relative_value_iteration",
               residual=2e-9, value_error_bound=None, q_error_bound=None,
               policy_loss_bound=4e-9)
    doc["average"] = {"gain": 1.25, "gain_lower": 1.249999999, "gain_upper": 1.250000001,
                      "gain_error_bound": 1e-9, "reference_state": "a", "multichain": True,
                      "recurrent_class_count": 2,
                      "recurrent_classes": [{"states": ["a", "b"], "size": 2},
                                            {"states": ["c"], "size": 1}],
                      "note": "two recurrent classes",
                      "state_gains": {"a": 1.25, "b": 1.25, "c": 0.0}}
    doc["values"] = {"a": 0.0, "b": -0.5, "c": 0.0}
    for e, v in zip(doc["states"], (0.0, -0.5, 0.0)):
        e["value"] = v
        e["gain"] = 0.0 if e["terminal"] else 1.25
    return doc


def sample_finite_horizon_solution():
    doc = sample_solution()
    doc.update(criterion={"kind": "finite_horizon", "discount": 1.0, "horizon": 6,
                          "terminal_values": {"b": 2.0}},
               method="backward_induction", iterations=6, sweeps=7, residual=0.0,
               value_error_bound=0.0, q_error_bound=0.0, policy_loss_bound=3e-9)
    doc["finite_horizon"] = {"horizon": 6, "stage": 3, "periods_remaining": 3}
    return doc


def sample_total_solution():
    """A total-reward solution in which b cannot reach the goal c with certainty."""
    doc = sample_solution()
    doc.update(criterion={"kind": "total"}, method="policy_iteration", tied_states=0,
               smallest_gaps=[])
    doc["values"] = {"a": 3.0, "b": None, "c": 0.0}
    doc["policy"] = {"a": "go"}
    doc["states"] = [
        {"state": "a", "terminal": False, "value": 3.0, "action": "go",
         "optimal_actions": ["go"], "action_gap": None, "q": {"stay": None, "go": 3.0},
         "reaches_goal": True, "expected_steps": 1.0},
        {"state": "b", "terminal": False, "value": None, "action": None,
         "optimal_actions": [], "action_gap": None, "q": {"stay": None, "go": None},
         "reaches_goal": False, "expected_steps": None},
        {"state": "c", "terminal": True, "value": 0.0, "action": None,
         "optimal_actions": [], "action_gap": None, "q": {}, "reaches_goal": True,
         "expected_steps": 0.0}]
    doc["total"] = {"goal_states": 1, "states_not_reaching_goal": 1,
                    "not_reaching_goal": ["b"], "max_expected_steps": 1.0}
    return doc


def edited(doc, change):
    doc = copy.deepcopy(doc)
    change(doc)
    return doc


def sample_verification(kind):
    if kind == "values":
        return {"format": "mdpserve/verification@1", "kind": "values", "verdict": "pass",
                "tolerance": 1e-6, "max_residual": 2e-9,
                "worst_states": [{"state": "a", "residual": 2e-9, "candidate": 3.27,
                                  "backup": 3.270000002}],
                "value_error_bound": 2e-8, "greedy_policy_loss_bound": 3.6e-8}
    return {"format": "mdpserve/verification@1", "kind": "policy", "verdict": "fail",
            "tolerance": 1e-6, "max_loss": 0.27,
            "worst_states": [{"state": "a", "loss": 0.27, "value": 3.0, "optimal_value": 3.27}],
            "suboptimal_states": [{"state": "a", "chosen": ["go"], "optimal_actions": ["stay"]}],
            "evaluation_error_bound": 1e-12, "optimal_value_error_bound": 1e-9,
            "values": {"a": 3.0, "b": 3.0, "c": 0.0}}


def dropped(doc, key):
    doc = copy.deepcopy(doc)
    del doc[key]
    return doc


def changed(doc, key, value):
    doc = copy.deepcopy(doc)
    doc[key] = value
    return doc


def sample_state_changed(**kw):
    doc = sample_solution()
    doc["states"][0].update(kw)
    return doc


# (label, schema file, document, must be accepted)
OTHER_DOCS = [
    ("values document", "values.schema.json",
     {"format": "mdpserve/values@1", "values": {"a": 3.27, "b": 3}}, True),
    ("solution accepted as values document", "values.schema.json", sample_solution(), True),
    ("values document with unknown field", "values.schema.json",
     {"format": "mdpserve/values@1", "values": {"a": 1.0}, "extra": 1}, False),
    ("values document with string value", "values.schema.json",
     {"format": "mdpserve/values@1", "values": {"a": "1.0"}}, False),
    ("values document with an empty state name", "values.schema.json",
     {"format": "mdpserve/values@1", "values": {"": 1.0}}, False),
    ("values document with wrong format", "values.schema.json",
     {"format": "mdpserve/policy@1", "values": {"a": 1.0}}, False),
    ("values document without values", "values.schema.json",
     {"format": "mdpserve/values@1"}, False),
    ("deterministic policy document", "policy.schema.json",
     {"format": "mdpserve/policy@1", "policy": {"a": "stay", "b": "go"}}, True),
    ("stochastic policy document", "policy.schema.json",
     {"format": "mdpserve/policy@1", "policy": {"a": {"stay": 0.25, "go": 0.75}, "b": "go"}},
     True),
    ("solution accepted as policy document", "policy.schema.json", sample_solution(), True),
    ("policy with probability 1.2", "policy.schema.json",
     {"format": "mdpserve/policy@1", "policy": {"a": {"stay": 1.2}}}, False),
    ("policy with empty stochastic entry", "policy.schema.json",
     {"format": "mdpserve/policy@1", "policy": {"a": {}}}, False),
    ("policy entry as number", "policy.schema.json",
     {"format": "mdpserve/policy@1", "policy": {"a": 1}}, False),
    ("policy document with unknown field", "policy.schema.json",
     {"format": "mdpserve/policy@1", "policy": {"a": "stay"}, "values": {}}, False),
    ("sample solution", "solution.schema.json", sample_solution(), True),
    ("summary solution (no states)", "solution.schema.json",
     dropped(sample_solution(), "states"), True),
    ("solution with an extra member", "solution.schema.json",
     changed(sample_solution(), "memory_bytes", 4096), True),
    ("solution cancelled before any sweep", "solution.schema.json",
     dict(sample_solution(), outcome="cancelled", iterations=0, sweeps=0, residual=None,
          value_error_bound=None, q_error_bound=None, policy_loss_bound=None), True),
    ("solution without values", "solution.schema.json",
     dropped(sample_solution(), "values"), False),
    ("solution with unknown method", "solution.schema.json",
     changed(sample_solution(), "method", "simplex"), False),
    ("solution with unknown outcome", "solution.schema.json",
     changed(sample_solution(), "outcome", "diverged"), False),
    ("solution with negative residual", "solution.schema.json",
     changed(sample_solution(), "residual", -1e-9), False),
    ("solution state without q", "solution.schema.json",
     (lambda d: (d["states"][0].pop("q"), d)[1])(sample_solution()), False),
    ("solution state with string action gap", "solution.schema.json",
     sample_state_changed(action_gap="inf"), False),
    ("solution with wrong format", "solution.schema.json",
     changed(sample_solution(), "format", "mdpserve/values@1"), False),
    ("discounted solution with a null value", "solution.schema.json",
     edited(sample_solution(), lambda d: d["values"].update(b=None)), False),
    ("discounted solution with an average block", "solution.schema.json",
     changed(sample_solution(), "average", sample_average_solution()["average"]), False),
    ("average solution", "solution.schema.json", sample_average_solution(), True),
    ("average solution, summary, without state gains", "solution.schema.json",
     edited(sample_average_solution(),
            lambda d: (d.pop("states"), d["average"].pop("state_gains"))), True),
    ("average solution without its average block", "solution.schema.json",
     dropped(sample_average_solution(), "average"), False),
    ("average solution with a null bias", "solution.schema.json",
     edited(sample_average_solution(), lambda d: d["states"][1].update(value=None)), False),
    ("average solution with a string gain", "solution.schema.json",
     edited(sample_average_solution(), lambda d: d["average"].update(gain="1.25")), False),
    ("average solution without reference_state", "solution.schema.json",
     edited(sample_average_solution(), lambda d: d["average"].pop("reference_state")), False),
    ("average solution listing 101 recurrent classes", "solution.schema.json",
     edited(sample_average_solution(), lambda d: d["average"].update(
         recurrent_classes=[{"states": ["a"], "size": 1}] * 101)), False),
    ("average solution with a finite_horizon block",
     "solution.schema.json",
     changed(sample_average_solution(), "finite_horizon",
             sample_finite_horizon_solution()["finite_horizon"]), False),
    ("finite-horizon solution", "solution.schema.json", sample_finite_horizon_solution(), True),
    ("finite-horizon solution without its block", "solution.schema.json",
     dropped(sample_finite_horizon_solution(), "finite_horizon"), False),
    ("finite-horizon solution at stage -1", "solution.schema.json",
     edited(sample_finite_horizon_solution(),
            lambda d: d["finite_horizon"].update(stage=-1)), False),
    ("finite-horizon solution with periods_remaining 0", "solution.schema.json",
     edited(sample_finite_horizon_solution(),
            lambda d: d["finite_horizon"].update(periods_remaining=0)), False),
    ("finite-horizon solution echoing a criterion without horizon", "solution.schema.json",
     edited(sample_finite_horizon_solution(), lambda d: d["criterion"].pop("horizon")), False),
    ("total solution with null values and q", "solution.schema.json", sample_total_solution(),
     True),
    ("total solution without its block", "solution.schema.json",
     dropped(sample_total_solution(), "total"), False),
    ("total solution without reaches_goal in a state", "solution.schema.json",
     edited(sample_total_solution(), lambda d: d["states"][0].pop("reaches_goal")), False),
    ("total solution with a negative expected step count", "solution.schema.json",
     edited(sample_total_solution(), lambda d: d["states"][0].update(expected_steps=-1)),
     False),
    ("total solution listing 101 states not reaching a goal", "solution.schema.json",
     edited(sample_total_solution(),
            lambda d: d["total"].update(not_reaching_goal=["b"] * 101)), False),
    ("total solution with goal_states 0", "solution.schema.json",
     edited(sample_total_solution(), lambda d: d["total"].update(goal_states=0)), False),
    ("verification of values", "verification.schema.json", sample_verification("values"), True),
    ("verification of a policy", "verification.schema.json", sample_verification("policy"),
     True),
    ("values verification without max_residual", "verification.schema.json",
     dropped(sample_verification("values"), "max_residual"), False),
    ("policy verification without values", "verification.schema.json",
     dropped(sample_verification("policy"), "values"), False),
    ("values verification with policy-shaped worst state", "verification.schema.json",
     changed(sample_verification("values"), "worst_states",
             sample_verification("policy")["worst_states"]), False),
    ("verification with verdict ok", "verification.schema.json",
     changed(sample_verification("values"), "verdict", "ok"), False),
    ("verification with unknown kind", "verification.schema.json",
     changed(sample_verification("values"), "kind", "q"), False),
    ("evaluation", "evaluation.schema.json",
     {"format": "mdpserve/evaluation@1", "values": {"a": 3.27, "b": 3.0, "c": 0.0},
      "linear_solver": "direct", "residual": 4e-16, "value_error_bound": 4e-15}, True),
    ("evaluation with unknown linear solver", "evaluation.schema.json",
     {"format": "mdpserve/evaluation@1", "values": {"a": 1.0},
      "linear_solver": "cholesky", "residual": 0.0, "value_error_bound": 0.0}, False),
    ("evaluation without residual", "evaluation.schema.json",
     {"format": "mdpserve/evaluation@1", "values": {"a": 1.0},
      "linear_solver": "sweeps", "value_error_bound": 0.0}, False),
    ("errors document", "errors.schema.json",
     {"format": "mdpserve/errors@1",
      "errors": [{"pointer": "/states/0/actions/0/outcomes/0/probability",
                  "message": "probability -0.2 is negative"},
                 {"pointer": "", "message": "line 3, column 7: expected ','"},
                 {"pointer": "/values/a~1b~0c", "message": "escaped pointer"}],
      "warnings": [{"pointer": "/states/4", "message": "no other state leads here"}],
      "truncated": 0}, True),
    ("errors document with pointer missing its slash", "errors.schema.json",
     {"format": "mdpserve/errors@1", "errors": [{"pointer": "states/0", "message": "x"}],
      "warnings": [], "truncated": 0}, False),
    ("errors document with a bad ~ escape", "errors.schema.json",
     {"format": "mdpserve/errors@1", "errors": [{"pointer": "/a~2", "message": "x"}],
      "warnings": [], "truncated": 0}, False),
    ("errors document with 101 errors", "errors.schema.json",
     {"format": "mdpserve/errors@1",
      "errors": [{"pointer": "/states/%d" % i, "message": "x"} for i in range(101)],
      "warnings": [], "truncated": 0}, False),
    ("errors document without truncated", "errors.schema.json",
     {"format": "mdpserve/errors@1", "errors": [], "warnings": []}, False),
]

def sample_simulation():
    return {
        "format": "mdpserve/simulation@1",
        "model": {"name": BASE_MODEL["name"], "states": 3, "actions": 2, "state_actions": 4,
                  "outcomes": 5},
        "objective": "maximize",
        "criterion": {"kind": "discounted", "discount": 0.9},
        "options": {"start": {"a": 1.0}, "episodes": 1000, "max_steps": 1000, "seed": 7,
                    "confidence": 0.95, "quantiles": [0.05, 0.5, 0.95]},
        "outcome": "completed",
        "episodes": 1000,
        "return": {"mean": 3.2, "std_dev": 1.1, "std_error": 0.035,
                   "confidence_interval": {"level": 0.95, "low": 3.13, "high": 3.27},
                   "min": 1.0, "max": 8.4,
                   "quantiles": [{"level": 0.05, "value": 1.0}, {"level": 0.5, "value": 2.9},
                                 {"level": 0.95, "value": 5.7}]},
        "episode_length": {"mean": 4.2, "truncated_episodes": 0},
        "truncation_bound": 1.7e-45, "truncation_bias_bound": 0.0,
        "visits": {"total_steps": 4200, "states_visited": 2,
                   "most_visited": [{"state": "a", "visits": 3000, "frequency": 0.714},
                                    {"state": "b", "visits": 1200, "frequency": 0.286}],
                   "unlisted_frequency": 0.0},
        "simulate_seconds": 0.002,
    }


def cancelled_simulation():
    doc = sample_simulation()
    doc.update(outcome="cancelled", episodes=0, truncation_bias_bound=0.0,
               episode_length={"mean": None, "truncated_episodes": 0},
               visits={"total_steps": 0, "states_visited": 0, "most_visited": [],
                       "unlisted_frequency": 0.0})
    doc["return"] = {"mean": None, "std_dev": None, "std_error": None,
                     "confidence_interval": {"level": 0.95, "low": None, "high": None},
                     "min": None, "max": None,
                     "quantiles": [{"level": 0.5, "value": None}]}
    return doc


OTHER_DOCS += [
    ("simulation", "simulation.schema.json", sample_simulation(), True),
    ("simulation cancelled before any episode", "simulation.schema.json",
     cancelled_simulation(), True),
    ("simulation with unknown outcome", "simulation.schema.json",
     changed(sample_simulation(), "outcome", "diverged"), False),
    ("simulation without return", "simulation.schema.json",
     dropped(sample_simulation(), "return"), False),
    ("simulation with confidence 1", "simulation.schema.json",
     (lambda d: (d["options"].update(confidence=1), d)[1])(sample_simulation()), False),
    ("start distribution", "start.schema.json",
     {"format": "mdpserve/start@1", "start": {"a": 0.25, "b": 0.75}}, True),
    ("start distribution with probability 1.5", "start.schema.json",
     {"format": "mdpserve/start@1", "start": {"a": 1.5}}, False),
    ("empty start distribution", "start.schema.json",
     {"format": "mdpserve/start@1", "start": {}}, False),
    ("start distribution with unknown member", "start.schema.json",
     {"format": "mdpserve/start@1", "start": {"a": 1.0}, "seed": 3}, False),
]


# Documents of the other criteria (verification, evaluation, simulation, candidates): what
# the if/then branches per criterion accept and refuse.

def criterion_verification(kind, criterion):
    """A verification document as `verify` writes it under `criterion`."""
    if kind == "values":
        doc = {"format": "mdpserve/verification@1", "kind": "values", "criterion": criterion,
               "verdict": "pass", "tolerance": 1e-6, "max_residual": 0.0,
               "value_error_bound": 0.0, "greedy_policy_loss_bound": 0.0,
               "worst_states": [{"state": "a", "residual": 0.0, "candidate": 3.0,
                                 "backup": 3.0}],
               "residuals": {"a": 0.0, "b": 0.0, "c": 0.0}}
        if criterion == "average":
            doc.update(max_residual=5e-10, value_error_bound=None, greedy_policy_loss_bound=1e-9,
                       gain_lower=1.4999999995, gain_upper=1.5000000005)
        elif criterion == "finite_horizon":
            doc.update(greedy_policy_loss_bound=None, reference_distance=0.0,
                       reference_error_bound=0.0)
        elif criterion == "total":
            doc.update(greedy_policy_loss_bound=None, reference_distance=0.0,
                       reference_error_bound=1e-13, value_error_bound=1e-13,
                       states_not_reaching_goal=1, residuals={"a": 0.0, "b": None, "c": 0.0})
        return doc
    doc = {"format": "mdpserve/verification@1", "kind": "policy", "criterion": criterion,
           "verdict": "pass", "tolerance": 1e-6, "max_loss": 0.0,
           "evaluation_error_bound": 1e-13, "optimal_value_error_bound": 1e-12,
           "improper_states": [], "improper_count": 0, "linear_solver": "direct",
           "worst_states": [{"state": "a", "loss": 0.0, "value": 3.0, "optimal_value": 3.0}],
           "suboptimal_states": [], "suboptimal_count": 0,
           "values": {"a": 3.0, "b": 3.0, "c": 0.0}, "losses": {"a": 0.0, "b": 0.0, "c": 0.0}}
    if criterion == "finite_horizon":
        doc.update(linear_solver="sweeps", evaluation_error_bound=0.0,
                   optimal_value_error_bound=0.0)
    return doc


def improper_verification():
    """Total reward: the policy stays in b for ever, where a goal could be reached."""
    doc = criterion_verification("policy", "total")
    doc.update(verdict="fail", max_loss=None, improper_states=["b"], improper_count=1,
               worst_states=[{"state": "b", "loss": None, "value": None, "optimal_value": 3.0}],
               values={"a": 3.0, "b": None, "c": 0.0}, losses={"a": 0.0, "b": None, "c": 0.0})
    return doc


def criterion_evaluation(criterion):
    doc = {"format": "mdpserve/evaluation@1", "criterion": criterion, "linear_solver": "direct",
           "residual": 0.0, "value_error_bound": 0.0, "iterations": 0,
           "values": {"a": 3.0, "b": 3.0, "c": 0.0}}
    if criterion == "finite_horizon":
        doc.update(linear_solver="sweeps")
    elif criterion == "average":
        doc.update(value_error_bound=None, residual=2e-16, gain_error_bound=2e-16,
                   values={"a": 0.44, "b": -0.89, "c": 0.0},
                   gains={"a": 4 / 3.0, "b": 4 / 3.0, "c": 0.0},
                   recurrent_classes=[{"states": ["a", "b"], "size": 2},
                                      {"states": ["c"], "size": 1}])
    elif criterion == "total":
        doc.update(values={"a": 3.0, "b": None, "c": 0.0},
                   expected_steps={"a": 1.0, "b": None, "c": 0.0},
                   improper_states=["b"], improper_count=1)
    return doc


def criterion_simulation(criterion, **members):
    doc = sample_simulation()
    doc["criterion"] = criterion
    doc.update(members)
    return doc


def episode_length(doc, truncated):
    doc = copy.deepcopy(doc)
    doc["episode_length"]["truncated_episodes"] = truncated
    return doc


AVERAGE_SIM = criterion_simulation({"kind": "average"}, return_kind="reward_per_step",
                                   truncation_bound=None, truncation_bias_bound=None)
HORIZON_SIM = criterion_simulation({"kind": "finite_horizon", "horizon": 6, "discount": 1.0},
                                   return_kind="horizon_sum", truncation_bound=0.0,
                                   truncation_bias_bound=0.0)
TOTAL_SIM = criterion_simulation({"kind": "total"}, return_kind="total_until_goal",
                                 truncation_bound=None, truncation_bias_bound=0.0)
VERIFY = "verification.schema.json"
EVALUATE = "evaluation.schema.json"
SIMULATE = "simulation.schema.json"

OTHER_DOCS += [
    ("values document with a null value (total: no value)", "values.schema.json",
     {"format": "mdpserve/values@1", "values": {"a": 3.0, "b": None}}, True),
    ("total solution as a values document (null values)", "values.schema.json",
     sample_total_solution(), True),
    ("total solution as a policy document (states left out)", "policy.schema.json",
     sample_total_solution(), True),
    ("values verification naming the discounted criterion", VERIFY,
     criterion_verification("values", "discounted"), True),
    ("discounted values verification with a null residual", VERIFY,
     edited(criterion_verification("values", "discounted"),
            lambda d: d["residuals"].update(b=None)), False),
    ("discounted values verification with a null value_error_bound", VERIFY,
     changed(criterion_verification("values", "discounted"), "value_error_bound", None), False),
    ("discounted values verification with a gain bracket", VERIFY,
     changed(criterion_verification("values", "discounted"), "gain_lower", 1.0), False),
    ("old values verification with a null max_residual (no criterion: discounted)", VERIFY,
     changed(sample_verification("values"), "max_residual", None), False),
    ("average values verification", VERIFY, criterion_verification("values", "average"), True),
    ("average values verification without gain_upper", VERIFY,
     dropped(criterion_verification("values", "average"), "gain_upper"), False),
    ("average values verification with a value_error_bound", VERIFY,
     changed(criterion_verification("values", "average"), "value_error_bound", 1e-9), False),
    ("average values verification with a reference_distance", VERIFY,
     changed(criterion_verification("values", "average"), "reference_distance", 0.0), False),
    ("average values verification without residuals", VERIFY,
     dropped(criterion_verification("values", "average"), "residuals"), False),
    ("finite-horizon values verification", VERIFY,
     criterion_verification("values", "finite_horizon"), True),
    ("finite-horizon values verification with a greedy policy loss bound", VERIFY,
     changed(criterion_verification("values", "finite_horizon"), "greedy_policy_loss_bound",
             0.0), False),
    ("finite-horizon values verification without reference_distance", VERIFY,
     dropped(criterion_verification("values", "finite_horizon"), "reference_distance"), False),
    ("total values verification with null residuals", VERIFY,
     criterion_verification("values", "total"), True),
    ("total values verification without a reference (null bounds, fail)", VERIFY,
     dict(criterion_verification("values", "total"), verdict="fail", value_error_bound=None,
          reference_distance=None, reference_error_bound=None), True),
    ("total values verification passing with a null value_error_bound", VERIFY,
     dict(criterion_verification("values", "total"), value_error_bound=None,
          reference_distance=None), False),
    ("total values verification without states_not_reaching_goal", VERIFY,
     dropped(criterion_verification("values", "total"), "states_not_reaching_goal"), False),
    ("total values verification with a gain bracket", VERIFY,
     changed(criterion_verification("values", "total"), "gain_upper", 1.0), False),
    ("values verification with an unknown criterion", VERIFY,
     changed(criterion_verification("values", "discounted"), "criterion", "undiscounted"),
     False),
    ("policy verification naming the discounted criterion", VERIFY,
     criterion_verification("policy", "discounted"), True),
    ("discounted policy verification with a null value", VERIFY,
     edited(criterion_verification("policy", "discounted"),
            lambda d: d["values"].update(b=None)), False),
    ("discounted policy verification with an improper state", VERIFY,
     changed(criterion_verification("policy", "discounted"), "improper_count", 1), False),
    ("policy verification naming its criterion without improper_count", VERIFY,
     dropped(criterion_verification("policy", "average"), "improper_count"), False),
    ("policy verification passing with a null evaluation_error_bound", VERIFY,
     changed(criterion_verification("policy", "average"), "evaluation_error_bound", None),
     False),
    ("average policy verification failing with a null optimal_value_error_bound", VERIFY,
     dict(criterion_verification("policy", "average"), verdict="fail",
          optimal_value_error_bound=None), True),
    ("average policy verification by sweeps", VERIFY,
     changed(criterion_verification("policy", "average"), "linear_solver", "sweeps"), False),
    ("finite-horizon policy verification", VERIFY,
     criterion_verification("policy", "finite_horizon"), True),
    ("finite-horizon policy verification with a non-zero evaluation error bound", VERIFY,
     changed(criterion_verification("policy", "finite_horizon"), "evaluation_error_bound",
             1e-9), False),
    ("finite-horizon policy verification by a direct solve", VERIFY,
     changed(criterion_verification("policy", "finite_horizon"), "linear_solver", "direct"),
     False),
    ("total policy verification of a proper policy", VERIFY,
     criterion_verification("policy", "total"), True),
    ("total policy verification with an improper state (null loss)", VERIFY,
     improper_verification(), True),
    ("total policy verification passing with an improper state", VERIFY,
     changed(improper_verification(), "verdict", "pass"), False),
    ("total policy verification with an improper state and a finite max_loss", VERIFY,
     changed(improper_verification(), "max_loss", 5.0), False),
    ("total policy verification counting an improper state it does not list", VERIFY,
     changed(improper_verification(), "improper_states", []), False),
    ("total policy verification with a null max_loss and no improper state", VERIFY,
     dict(criterion_verification("policy", "total"), verdict="fail", max_loss=None), False),
    ("total policy verification listing 101 improper states", VERIFY,
     changed(improper_verification(), "improper_states", ["b"] * 101), False),
    ("evaluation naming the discounted criterion", EVALUATE,
     criterion_evaluation("discounted"), True),
    ("discounted evaluation with a null value", EVALUATE,
     edited(criterion_evaluation("discounted"), lambda d: d["values"].update(b=None)), False),
    ("old evaluation (no criterion) with gains", EVALUATE,
     changed(criterion_evaluation("discounted"), "gains", {"a": 1.0}), False),
    ("finite-horizon evaluation", EVALUATE, criterion_evaluation("finite_horizon"), True),
    ("finite-horizon evaluation by a direct solve", EVALUATE,
     changed(criterion_evaluation("finite_horizon"), "linear_solver", "direct"), False),
    ("average evaluation", EVALUATE, criterion_evaluation("average"), True),
    ("average evaluation without gains", EVALUATE,
     dropped(criterion_evaluation("average"), "gains"), False),
    ("average evaluation with a bound on the bias", EVALUATE,
     changed(criterion_evaluation("average"), "value_error_bound", 1e-9), False),
    ("average evaluation with an empty recurrent class", EVALUATE,
     changed(criterion_evaluation("average"), "recurrent_classes",
             [{"states": [], "size": 0}]), False),
    ("average evaluation with expected steps", EVALUATE,
     changed(criterion_evaluation("average"), "expected_steps", {"a": 1.0}), False),
    ("total evaluation with an improper state", EVALUATE, criterion_evaluation("total"), True),
    ("total evaluation without expected_steps", EVALUATE,
     dropped(criterion_evaluation("total"), "expected_steps"), False),
    ("total evaluation counting an improper state it does not list", EVALUATE,
     changed(criterion_evaluation("total"), "improper_states", []), False),
    ("total evaluation with a negative expected step count", EVALUATE,
     edited(criterion_evaluation("total"), lambda d: d["expected_steps"].update(a=-1.0)),
     False),
    ("discounted simulation with its return_kind", SIMULATE,
     changed(sample_simulation(), "return_kind", "discounted_sum"), True),
    ("discounted simulation with a null truncation bound", SIMULATE,
     changed(sample_simulation(), "truncation_bound", None), False),
    ("discounted simulation with the average return_kind", SIMULATE,
     changed(sample_simulation(), "return_kind", "reward_per_step"), False),
    ("simulation with an unknown return_kind", SIMULATE,
     changed(sample_simulation(), "return_kind", "undiscounted_sum"), False),
    ("average simulation (reward per step, no truncation bound)", SIMULATE, AVERAGE_SIM, True),
    ("average simulation without return_kind", SIMULATE, dropped(AVERAGE_SIM, "return_kind"),
     False),
    ("average simulation with a truncation bound", SIMULATE,
     changed(AVERAGE_SIM, "truncation_bound", 0.0), False),
    ("average simulation with truncated episodes", SIMULATE, episode_length(AVERAGE_SIM, 3),
     False),
    ("finite-horizon simulation", SIMULATE, HORIZON_SIM, True),
    ("finite-horizon simulation with a null truncation bound", SIMULATE,
     changed(HORIZON_SIM, "truncation_bound", None), False),
    ("finite-horizon simulation with the total return_kind", SIMULATE,
     changed(HORIZON_SIM, "return_kind", "total_until_goal"), False),
    ("total simulation without cut episodes", SIMULATE, TOTAL_SIM, True),
    ("total simulation with cut episodes (no bias bound)", SIMULATE,
     changed(episode_length(TOTAL_SIM, 3), "truncation_bias_bound", None), True),
    ("total simulation with cut episodes and a bias bound of 0", SIMULATE,
     episode_length(TOTAL_SIM, 3), False),
    ("total simulation with a finite truncation bound", SIMULATE,
     changed(TOTAL_SIM, "truncation_bound", 1.0), False),
]


# --------------------------------------------------------------------------------------------
# Parts (a) to (c)

def check_schema_files(rep, root):
    schema_dir = os.path.join(root, "api-schema")
    for f in SCHEMA_FILES:
        path = os.path.join(schema_dir, f)
        try:
            with open(path, encoding="utf-8") as fh:
                schema = json.load(fh)
        except (OSError, ValueError) as e:
            rep.check("schema %s parses" % f, False, str(e))
            continue
        try:
            Draft202012Validator.check_schema(schema)
            rep.check("schema %s is a valid 2020-12 schema" % f, True)
        except jsonschema.exceptions.SchemaError as e:
            rep.check("schema %s is a valid 2020-12 schema" % f, False, e.message)
        header = []
        if schema.get("$schema") != "https://json-schema.org/draft/2020-12/schema":
            header.append("$schema")
        if schema.get("$id") != SCHEMA_BASE + f:
            header.append("$id")
        if not schema.get("title"):
            header.append("title")
        if not schema.get("description"):
            header.append("description")
        rep.check("schema %s has $schema, $id, title, description" % f, not header,
                  "bad: " + ", ".join(header) if header else "")
        missing = missing_descriptions(schema)
        rep.check("schema %s documents every property" % f, not missing,
                  "no description at " + ", ".join(missing[:5]) if missing else "")
    try:
        return Schemas(schema_dir)
    except (OSError, ValueError) as e:
        rep.check("schema set loads", False, str(e))
        return None


def check_examples(rep, root, schemas):
    examples = sorted(glob.glob(os.path.join(root, "api-schema", "examples", "*.json")))
    rep.check("at least 3 example models", len(examples) >= 3, "%d found" % len(examples),
              info="%d found" % len(examples))
    for path in examples:
        name = os.path.basename(path)
        with open(path, encoding="utf-8") as fh:
            doc = json.load(fh)
        errs = schemas.errors("model.schema.json", doc)
        rep.check("example %s matches model.schema.json" % name, not errs,
                  "; ".join("%s: %s" % e for e in errs[:3]))
        if errs:
            continue
        problems = cross_reference_problems(doc)
        rep.check("example %s obeys the cross-reference rules" % name, not problems,
                  "; ".join("%s: %s" % p for p in problems[:3]))
        warns = warning_sources(doc)
        n = len(doc["states"])
        rep.check("example %s is warning-free with 8..40 states" % name,
                  not warns and 8 <= n <= 40, "%d states; warnings at %s" % (n, warns[:3]),
                  info="%d states" % n)


class DuplicateKey(ValueError):
    pass


def _unique_keys(pairs):
    keys = [k for k, _ in pairs]
    for k in keys:
        if keys.count(k) > 1:
            raise DuplicateKey("key %r twice" % k)
    return dict(pairs)


def check_bad_models(rep, schemas):
    for label, doc, expected in SCHEMA_BAD:
        errs = schemas.errors("model.schema.json", doc)
        located = [p for p, _ in errs if within(p, expected)]
        rep.check("schema rejects bad model: %s" % label, bool(located),
                  "accepted" if not errs else
                  "no error at or under %r, got %s" % (expected, [p for p, _ in errs]),
                  info="at %r" % located[0] if located else "")
    for label, doc in SCHEMA_GOOD:
        errs = schemas.errors("model.schema.json", doc)
        problems = cross_reference_problems(doc)
        rep.check("schema accepts valid model: %s" % label, not errs and not problems,
                  "; ".join("%s: %s" % e for e in (errs + problems)[:3]))
    for label, text, _ in DECODER_BAD:
        try:
            doc = json.loads(text, object_pairs_hook=_unique_keys)
        except DuplicateKey as e:
            rep.check("decoder-only case has a duplicate key: %s" % label, True, info=str(e))
            continue
        except ValueError:
            rep.check("decoder-only case is not JSON: %s" % label, True)
            continue
        errs = schemas.errors("model.schema.json", doc)
        problems = cross_reference_problems(doc)
        rep.check("schema cannot see decoder-only error: %s" % label, not errs and problems,
                  "schema errors %s; reference problems %s" % (errs[:2], problems[:2]))
    for label, doc, expected in WARNING_MODELS:
        errs = schemas.errors("model.schema.json", doc)
        warns = warning_sources(doc)
        rep.check("schema accepts warning-only model: %s" % label,
                  not errs and expected in warns, "errors %s; warnings %s" % (errs[:2], warns))


def check_other_documents(rep, schemas):
    for label, fname, doc, accept in OTHER_DOCS:
        errs = schemas.errors(fname, doc)
        if accept:
            rep.check("%s accepts %s" % (fname, label), not errs,
                      "; ".join("%s: %s" % e for e in errs[:3]))
        else:
            rep.check("%s rejects %s" % (fname, label), bool(errs), "accepted",
                      info="at %r" % errs[0][0] if errs else "")


# --------------------------------------------------------------------------------------------
# Part (e): the compact (arrays) encoding, model-arrays.schema.json

def _arrays_set(member, index, value):
    def change(doc):
        doc[member][index] = value
    return change


def _arrays_put(member, value):
    def change(doc):
        doc[member] = value
    return change


def _arrays_drop(member):
    def change(doc):
        del doc[member]
    return change


def _arrays_drop_last(member):
    def change(doc):
        doc[member].pop()
    return change


def _arrays_halve_first_probability(doc):
    doc["probability"][0] = doc["probability"][0] / 2


def _arrays_state_goes_back(doc):
    doc["sa_state"][-1] = 0


# (label, change, schema error at or under POINTER (None: the schema accepts it), words the
# schema's message must contain when the pointer is the root, mdpserve error at or under).
ARRAYS_MANGLED = [
    ("unknown format version", _arrays_put("format", "mdpserve/model-arrays@2"), "/format", "",
     "/format"),
    # Read as the object encoding its format names, whose states are objects, not names.
    ("object format string", _arrays_put("format", "mdpserve/model@1"), "/format", "",
     "/states/0"),
    ("probability as a string", _arrays_set("probability", 0, "0.5"), "/probability/0", "",
     "/probability/0"),
    ("probability above 1", _arrays_set("probability", 0, 1.5), "/probability/0", "",
     "/probability/0"),
    ("negative next index", _arrays_set("next", 0, -1), "/next/0", "", "/next/0"),
    ("fractional action index", _arrays_set("sa_action", 0, 0.5), "/sa_action/0", "",
     "/sa_action/0"),
    ("zero outcome count", _arrays_set("sa_outcomes", 0, 0), "/sa_outcomes/0", "",
     "/sa_outcomes"),
    ("unknown member", _arrays_put("transitions", []), "", "'transitions'", "/transitions"),
    ("missing next", _arrays_drop("next"), "", "'next'", "/next"),
    ("states as an object", _arrays_put("states", {"a": 1}), "/states", "", "/states"),
    # What only the decoder can see (lengths, ranges, order, sums): the schema accepts these.
    ("next index out of range", lambda d: d["next"].__setitem__(0, len(d["states"])), None, "",
     "/next/0"),
    ("probability column shorter than next", _arrays_drop_last("probability"), None, "",
     "/probability"),
    ("sa_state decreases", _arrays_state_goes_back, None, "", "/sa_state"),
    ("probabilities of row 0 sum to less than 1", _arrays_halve_first_probability, None, "",
     "/sa_outcomes/0"),
]


def convert_to_arrays(rep, root, path, out):
    """scripts/model_to_arrays.py IN OUT; returns the arrays document or None."""
    script = os.path.join(root, "scripts", "model_to_arrays.py")
    rc, _, err = run([sys.executable, script, "--to", "arrays", path, out], root)
    if not rep.check("model_to_arrays.py converts %s" % os.path.basename(path), rc == 0,
                     "exit %r; %s" % (rc, short(err))):
        return None
    with open(out, encoding="utf-8") as fh:
        return json.load(fh)


def mdpserve_errors(rep, schemas, binary, root, what, path):
    """Runs `mdpserve validate PATH`; returns (exit code, errors document or None)."""
    rc, out, err = run([binary, "validate", path], root)
    if rc is None or not out.strip():
        rep.check("%s prints an errors document" % what, False, "exit %r; %s" % (rc, short(err)))
        return rc, None
    return rc, validated_output(rep, schemas, what, "errors.schema.json", out)


def check_arrays_encoding(rep, schemas, binary, root, tmp):
    """Every example converted to the arrays encoding is accepted by model-arrays.schema.json
    and (with a binary) by `mdpserve validate`; mangled documents are rejected by both, or,
    for what JSON Schema cannot express, by mdpserve alone."""
    examples = sorted(glob.glob(os.path.join(root, "api-schema", "examples", "*.json")))
    converted = []
    for path in examples:
        name = os.path.basename(path)
        out = os.path.join(tmp, "arrays-" + name)
        doc = convert_to_arrays(rep, root, path, out)
        if doc is None:
            continue
        converted.append((name, doc))
        errs = schemas.errors("model-arrays.schema.json", doc)
        rep.check("arrays example %s matches model-arrays.schema.json" % name, not errs,
                  "; ".join("%s: %s" % e for e in errs[:3]))
        rep.check("arrays example %s is not an object-encoding document" % name,
                  bool(schemas.errors("model.schema.json", doc)), "model.schema.json accepts it")
        if not binary:
            continue
        what = "validate accepts arrays example %s" % name
        rc, result = mdpserve_errors(rep, schemas, binary, root, what, out)
        rep.check("%s (exit 0, no errors)" % what,
                  rc == 0 and result is not None and not result["errors"],
                  "exit %r; errors %s" % (rc, (result or {}).get("errors", [])[:3]))
    # Mangled variants of the first example with more than one state, each in a file.
    base = next((doc for _, doc in converted if len(doc["states"]) > 1), None)
    if not rep.check("an arrays example to mangle", base is not None, "none converted"):
        return
    for i, (label, change, schema_at, words, mdpserve_at) in enumerate(ARRAYS_MANGLED):
        doc = copy.deepcopy(base)
        change(doc)
        errs = schemas.errors("model-arrays.schema.json", doc)
        if schema_at is None:
            rep.check("model-arrays.schema.json cannot see decoder-only error: %s" % label,
                      not errs, "schema errors %s" % errs[:2])
        else:
            located = [(p, m) for p, m in errs if within(p, schema_at) and words in m]
            rep.check("model-arrays.schema.json rejects %s" % label, bool(located),
                      "accepted" if not errs else "no error at or under %r (%r), got %s"
                      % (schema_at, words, errs[:3]), info="at %r" % (located or [("",)])[0][0])
        if not binary:
            continue
        path = os.path.join(tmp, "arrays-bad-%02d.json" % i)
        with open(path, "w", encoding="utf-8") as fh:
            json.dump(doc, fh)
        what = "validate refuses arrays document with %s" % label
        rc, result = mdpserve_errors(rep, schemas, binary, root, what, path)
        pointers = [e["pointer"] for e in (result or {}).get("errors", [])]
        rep.check("%s (non-zero exit, error at or under %r)" % (what, mdpserve_at),
                  rc not in (None, 0) and 0 < rc < 128
                  and any(within(p, mdpserve_at) for p in pointers),
                  "exit %r; errors at %s" % (rc, pointers[:5]))


# --------------------------------------------------------------------------------------------
# Part (d): the CLI

def run(cmd, cwd):
    try:
        p = subprocess.run(cmd, cwd=cwd, stdout=subprocess.PIPE, stderr=subprocess.PIPE,
                           stdin=subprocess.DEVNULL, timeout=CLI_TIMEOUT)
    except subprocess.TimeoutExpired:
        return None, "", "timed out after %d s" % CLI_TIMEOUT
    except OSError as e:
        return None, "", str(e)
    return (p.returncode, p.stdout.decode("utf-8", "replace"),
            p.stderr.decode("utf-8", "replace"))


def short(text, n=300):
    text = text.strip().replace("\n", " | ")
    return text if len(text) <= n else text[:n] + "..."


def _no_constant(name):
    raise ValueError("%s is not JSON (RFC 8259 has no NaN or infinity)" % name)


def parse_json(text):
    """Strict parse of a CLI output: Python's NaN/Infinity extensions are errors."""
    try:
        return json.loads(text, parse_constant=_no_constant), None
    except ValueError as e:
        return None, str(e)


def validated_output(rep, schemas, label, fname, text):
    """Parses and validates an output document; returns it or None."""
    doc, err = parse_json(text)
    if doc is None:
        rep.check("%s prints JSON" % label, False, "%s; output: %s" % (err, short(text)))
        return None
    errs = schemas.errors(fname, doc)
    rep.check("%s output matches %s" % (label, fname), not errs,
              "; ".join("%s: %s" % e for e in errs[:3]))
    return doc if not errs else None


def check_solution_content(rep, label, model, sol, ties):
    problems = []
    states = model["states"]
    terminal = {s["name"] for s in states if s.get("terminal", False)}
    available = {s["name"]: [a["action"] for a in s.get("actions", [])] for s in states}
    nonterminal = [s["name"] for s in states if s["name"] not in terminal]
    m = sol["model"]
    if m["name"] != model["name"]:
        problems.append("model.name %r" % m["name"])
    if m["states"] != len(states):
        problems.append("model.states %r, expected %d" % (m["states"], len(states)))
    if m["actions"] != len(model["actions"]):
        problems.append("model.actions %r" % m["actions"])
    n_sa = sum(len(v) for v in available.values())
    if m["state_actions"] != n_sa:
        problems.append("model.state_actions %r, expected %d" % (m["state_actions"], n_sa))
    n_out = sum(len(a["outcomes"]) for s in states for a in s.get("actions", []))
    if not 0 < m["outcomes"] <= n_out:
        problems.append("model.outcomes %r, model lists %d" % (m["outcomes"], n_out))
    if m.get("reward_unit") != model.get("reward_unit"):
        problems.append("model.reward_unit %r" % m.get("reward_unit"))
    if sol["objective"] != model["objective"]:
        problems.append("objective %r" % sol["objective"])
    if sol["criterion"] != echoed_criterion(model["criterion"]):
        problems.append("criterion %r" % sol["criterion"])
    kind = model["criterion"]["kind"]
    for block in ("average", "finite_horizon", "total"):
        if (block in sol) != (block == kind):
            problems.append("block %r %s" % (block, "present" if block in sol else "missing"))
    missing = [s for s in nonterminal if s not in sol["values"]]
    if missing:
        problems.append("values lack %s" % missing[:3])
    stray = [s for s in sol["values"] if s not in available]
    if stray:
        problems.append("values name unknown states %s" % stray[:3])
    # Total reward: states that cannot reach a goal with certainty have no value and no pick.
    stuck = {s for s, v in sol["values"].items() if v is None}
    if stuck and kind != "total":
        problems.append("null values %s under the %s criterion" % (sorted(stuck)[:3], kind))
    listed = sol.get("total", {}).get("not_reaching_goal", [])
    if kind == "total" and sorted(stuck) != sorted(listed):
        problems.append("null values %s but not_reaching_goal %s"
                        % (sorted(stuck)[:3], listed[:3]))
    # (An average-reward bias says nothing about a terminal state itself.)
    nonzero = [s for s in terminal if sol["values"].get(s, 0.0) != 0.0]
    if nonzero and kind != "average":
        problems.append("terminal states with non-zero value %s" % nonzero[:3])
    if set(sol["policy"]) != set(nonterminal) - stuck:
        problems.append("policy keys differ from the non-terminal states that have a value")
    bad = [s for s, a in sol["policy"].items() if a not in available.get(s, [])]
    if bad:
        problems.append("policy picks unavailable actions in %s" % bad[:3])
    rep.check("%s solution is consistent with the model" % label, not problems,
              "; ".join(problems[:4]))
    if "states" not in sol:
        rep.check("%s solution has per-state detail by default" % label, False,
                  "no `states` member")
        return
    detail = []
    entries = sol["states"]
    if [e["state"] for e in entries] != [s["name"] for s in states]:
        detail.append("states entries are not one per state in model order")
    by_name = {e["state"]: e for e in entries}
    tied = 0
    for s in states:
        e = by_name.get(s["name"])
        if e is None:
            continue
        name = s["name"]
        if e["terminal"] != (name in terminal):
            detail.append("%s: terminal %r" % (name, e["terminal"]))
        if name in terminal:
            if e["action"] is not None or e["optimal_actions"] or e["q"] or \
                    (e["value"] != 0 and kind != "average"):
                detail.append("%s: terminal entry not empty" % name)
            continue
        if set(e["q"]) != set(available[name]):
            detail.append("%s: q keys %s" % (name, sorted(e["q"])))
        if kind == "total":
            if e["reaches_goal"] != (name not in stuck):
                detail.append("%s: reaches_goal %r" % (name, e["reaches_goal"]))
            if (e["expected_steps"] is None) != (name in stuck):
                detail.append("%s: expected_steps %r" % (name, e["expected_steps"]))
        if name in stuck:
            if e["action"] is not None or e["optimal_actions"] or e["value"] is not None or \
                    any(q is not None for q in e["q"].values()) or e["action_gap"] is not None:
                detail.append("%s: entry of a state that cannot reach a goal not empty" % name)
            continue
        with_q = [a for a, q in e["q"].items() if q is not None]  # total: safe actions
        if e["action"] != sol["policy"].get(name):
            detail.append("%s: action differs from policy" % name)
        if e["action"] not in e["optimal_actions"]:
            detail.append("%s: action not among optimal_actions" % name)
        if not set(e["optimal_actions"]) <= set(available[name]):
            detail.append("%s: optimal_actions not available" % name)
        if not set(e["optimal_actions"]) <= set(with_q):
            detail.append("%s: an optimal action has a null q" % name)
        if (e["action_gap"] is None) != (len(with_q) < 2) and \
                not (kind == "average" and sol["average"]["multichain"]):
            # (A multichain average solution compares only the actions that keep the gain.)
            detail.append("%s: action_gap %r with %d actions"
                          % (name, e["action_gap"], len(with_q)))
        if e["value"] != sol["values"].get(name):
            detail.append("%s: value differs from values" % name)
        if len(e["optimal_actions"]) > 1:
            tied += 1
    if tied != sol["tied_states"]:
        detail.append("tied_states %r but %d entries have several optimal actions"
                      % (sol["tied_states"], tied))
    rep.check("%s per-state detail is consistent" % label, not detail, "; ".join(detail[:4]))
    for state, actions in sorted(ties.items()):
        e = by_name.get(state)
        got = set(e["optimal_actions"]) if e else set()
        rep.check("%s reports the tie in %s" % (label, state), actions <= got,
                  "optimal_actions %s, expected %s among them" % (sorted(got), sorted(actions)))


def echoed_criterion(criterion):
    """The criterion as a solution echoes it: a finite horizon's default discount written out,
    zero terminal values left out."""
    c = dict(criterion)
    if c["kind"] == "finite_horizon":
        c.setdefault("discount", 1.0)
        values = {k: v for k, v in c.pop("terminal_values", {}).items() if v != 0}
        if values:
            c["terminal_values"] = values
    return c


def close(a, b, tol=1e-9):
    """a and b agree within tol, relative to their size; None only with None."""
    if a is None or b is None:
        return a is None and b is None
    return abs(a - b) <= tol * (1.0 + abs(b))


def reference_solvers(root):
    """scripts/make_examples.py, whose plain-Python solvers serve as references."""
    spec = importlib.util.spec_from_file_location(
        "make_examples", os.path.join(root, "scripts", "make_examples.py"))
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module


def solve_to_document(rep, schemas, binary, root, tmp, path, extra, label):
    """Runs `solve PATH EXTRA --out TMP`; returns the schema-valid document or None."""
    out = os.path.join(tmp, "%s.%d.solution.json" % (os.path.basename(path), len(extra)))
    rc, _, err = run([binary, "solve", path] + extra + ["--out", out], root)
    if not rep.check("%s exits 0" % label, rc == 0, "exit %r; %s" % (rc, short(err))):
        return None
    with open(out, encoding="utf-8") as fh:
        return validated_output(rep, schemas, label, "solution.schema.json", fh.read())


def check_stage(rep, label, model, sol, V, Q, stage):
    """A finite-horizon solution document at `stage` against backward induction."""
    horizon = model["criterion"]["horizon"]
    problems = []
    want = {"horizon": horizon, "stage": stage, "periods_remaining": horizon - stage}
    if sol["finite_horizon"] != want:
        problems.append("finite_horizon %r, expected %r" % (sol["finite_horizon"], want))
    if sol["method"] != "backward_induction" or sol["value_error_bound"] != 0 or \
            sol["residual"] != 0:
        problems.append("method %r, residual %r, value_error_bound %r"
                        % (sol["method"], sol["residual"], sol["value_error_bound"]))
    sign = 1.0 if model["objective"] == "maximize" else -1.0
    for name, v in sol["values"].items():
        if not close(v, V[stage][name]):
            problems.append("V_%d(%s) %r, reference %r" % (stage, name, v, V[stage][name]))
    for e in sol.get("states", []):
        for a, q in e["q"].items():
            if not close(q, Q[stage][e["state"]][a]):
                problems.append("Q_%d(%s, %s) %r, reference %r"
                                % (stage, e["state"], a, q, Q[stage][e["state"]][a]))
    for name, a in sol["policy"].items():
        best = max(sign * q for q in Q[stage][name].values())
        if sign * Q[stage][name][a] < best - 1e-9 * (1 + abs(best)):
            problems.append("stage %d picks %s in %s, not optimal" % (stage, a, name))
    rep.check("%s agrees with backward induction at stage %d" % (label, stage), not problems,
              "; ".join(problems[:4]))


def check_average(rep, label, model, sol, reference):
    """An average-reward solution document against relative value iteration (unichain)."""
    lo, hi, h, q = reference
    a = sol["average"]
    problems = []
    if not (a["gain_lower"] - 1e-9 <= hi and lo <= a["gain_upper"] + 1e-9):
        problems.append("bracket [%r, %r] misses the reference [%r, %r]"
                        % (a["gain_lower"], a["gain_upper"], lo, hi))
    if not a["gain_lower"] <= a["gain"] <= a["gain_upper"] or \
            not close(a["gain_error_bound"], (a["gain_upper"] - a["gain_lower"]) / 2, 1e-6):
        problems.append("gain %r, error bound %r" % (a["gain"], a["gain_error_bound"]))
    if sol["outcome"] == "converged" and \
            a["gain_upper"] - a["gain_lower"] > sol["options"]["tolerance"]:
        problems.append("converged with a bracket wider than the tolerance")
    if sol["value_error_bound"] is not None or sol["q_error_bound"] is not None:
        problems.append("value/q error bounds %r, %r, expected null"
                        % (sol["value_error_bound"], sol["q_error_bound"]))
    if a["reference_state"] != model["states"][0]["name"] or \
            sol["values"][a["reference_state"]] != 0:
        problems.append("reference state %r" % a["reference_state"])
    if a["recurrent_class_count"] != len(a["recurrent_classes"]) or \
            a["multichain"] != (a["recurrent_class_count"] >= 2) or \
            any(c["size"] != len(c["states"]) for c in a["recurrent_classes"]):
        problems.append("recurrent classes %r" % a["recurrent_classes"][:3])
    for name, v in sol["values"].items():
        if not close(v, h[name], 1e-6):
            problems.append("bias %s %r, reference %r" % (name, v, h[name]))
    for e in sol.get("states", []):
        for act, value in e["q"].items():
            if not close(value, q[e["state"]][act], 1e-6):
                problems.append("q(%s, %s) %r, reference %r"
                                % (e["state"], act, value, q[e["state"]][act]))
    rep.check("%s agrees with relative value iteration" % label, not problems,
              "; ".join(problems[:4]), info="gain %.10g" % a["gain"])


def check_total(rep, label, model, sol, ref):
    """A total-reward solution document against value iteration over the safe actions."""
    V, Q, _ = ref.total_reward(model)
    problems = []
    for name, v in sol["values"].items():
        if not close(v, V[name]):
            problems.append("V(%s) %r, reference %r" % (name, v, V[name]))
    for e in sol.get("states", []):
        for a, q in e["q"].items():
            if not close(q, Q[e["state"]][a]):
                problems.append("q(%s, %s) %r, reference %r" % (e["state"], a, q,
                                                                Q[e["state"]][a]))
    states = [s["name"] for s in model["states"]]
    stuck = [n for n in states if V[n] is None]
    want = {"goal_states": sum(1 for s in model["states"] if s.get("terminal", False)),
            "states_not_reaching_goal": len(stuck), "not_reaching_goal": stuck[:100]}
    got = {k: sol["total"][k] for k in want}
    if got != want:
        problems.append("total %r, expected %r" % (got, want))
    steps = ref.expected_steps(model, sol["policy"])
    for e in sol.get("states", []):
        if not close(e["expected_steps"], steps[e["state"]]):
            problems.append("expected_steps(%s) %r, reference %r"
                            % (e["state"], e["expected_steps"], steps[e["state"]]))
    finite = [x for x in steps.values() if x is not None]
    if not close(sol["total"]["max_expected_steps"], max(finite)):
        problems.append("max_expected_steps %r, reference %r"
                        % (sol["total"]["max_expected_steps"], max(finite)))
    rep.check("%s agrees with the reference total reward, unsafe actions and steps" % label,
              not problems, "; ".join(problems[:4]),
              info="%d states without a value" % len(stuck))


def check_cli_criterion(rep, schemas, binary, root, tmp, path, model, sol):
    """The solution of an example of the average, finite_horizon or total criterion against
    the reference solvers, and the criterion's own CLI runs."""
    name = os.path.basename(path)
    ref = reference_solvers(root)
    kind = model["criterion"]["kind"]
    if kind == "finite_horizon":
        V, Q = ref.backward_induction(model)
        check_stage(rep, "solve %s" % name, model, sol, V, Q, 0)
        label = "solve %s --stage 3" % name
        doc = solve_to_document(rep, schemas, binary, root, tmp, path, ["--stage", "3"], label)
        if doc is not None:
            check_solution_content(rep, label, model, doc, {})
            check_stage(rep, label, model, doc, V, Q, 3)
    elif kind == "average":
        reference = ref.relative_value_iteration(model)
        check_average(rep, "solve %s" % name, model, sol, reference)
        label = "solve %s --method relative_value_iteration" % name
        doc = solve_to_document(rep, schemas, binary, root, tmp, path,
                                ["--method", "relative_value_iteration"], label)
        if doc is not None:
            rep.check("%s reports its method" % label,
                      doc["method"] == "relative_value_iteration", repr(doc["method"]))
            check_solution_content(rep, label, model, doc, {})
            check_average(rep, label, model, doc, reference)
        rc, _, err = run([binary, "solve", path, "--method", "value_iteration"], root)
        rep.check("solve %s --method value_iteration is refused (exit 2) naming the methods "
                  "that apply" % name,
                  rc == 2 and "does not apply to the average criterion" in err and
                  "relative_value_iteration" in err and "policy_iteration" in err,
                  "exit %r; %s" % (rc, short(err)))
        rc, _, err = run([binary, "solve", path, "--stage", "3"], root)
        rep.check("solve %s --stage 3 is refused (exit 2): not a finite horizon" % name,
                  rc == 2 and "finite-horizon" in err, "exit %r; %s" % (rc, short(err)))
    elif kind == "total":
        check_total(rep, "solve %s" % name, model, sol, ref)


# --------------------------------------------------------------------------------------------
# verify, evaluate and simulate under the average, finite_horizon and total criteria

SIM_EPISODES = 20000      # episodes of each criterion simulation
SIM_AVERAGE_STEPS = 2000  # steps averaged over by an average-reward episode
SIM_CONFIDENCE = 0.999


def write_json(tmp, fname, doc):
    path = os.path.join(tmp, fname)
    with open(path, "w", encoding="utf-8") as fh:
        json.dump(doc, fh)
    return path


def cli_document(rep, schemas, binary, root, args, label, fname, exits):
    """Runs `mdpserve ARGS`; checks the exit code is in `exits` and stdout is a document valid
    against `fname`. Returns (exit code, document) or (exit code, None)."""
    rc, out, err = run([binary] + args, root)
    if not rep.check("%s exits %s" % (label, " or ".join(str(e) for e in exits)), rc in exits,
                     "exit %r; %s" % (rc, short(err))):
        return rc, None
    return rc, validated_output(rep, schemas, label, fname, out)


def stationary_stage_zero(ref, model, policy):
    """V^pi_0 of the deterministic `policy` applied at every stage of a finite-horizon model
    (plain Python; terminal states stay 0)."""
    c = model["criterion"]
    g = c.get("discount", 1.0)
    rows = ref.expected_rewards(model)
    V = {n: c.get("terminal_values", {}).get(n, 0.0) for n in rows}
    for _ in range(c["horizon"]):
        nxt = {}
        for n in rows:
            if n not in policy:
                nxt[n] = 0.0
                continue
            r, outcomes = rows[n][policy[n]]
            nxt[n] = r + g * sum(p * V[x] for x, p in outcomes)
        V = nxt
    return V


def far_apart(got, want, tol, what):
    """Entries of two {state: number or None} maps that differ by more than `tol` (None only
    matches None)."""
    problems = []
    for s in sorted(set(got) | set(want)):
        a, b = got.get(s, "missing"), want.get(s, "missing")
        if a is None or b is None or isinstance(a, str) or isinstance(b, str):
            if a is not b:
                problems.append("%s(%s) %r, expected %r" % (what, s, a, b))
        elif abs(a - b) > tol:
            problems.append("%s(%s) %r, expected %r" % (what, s, a, b))
    return problems


def solution_gain(sol, state):
    a = sol["average"]
    return a["state_gains"][state] if "state_gains" in a else a["gain"]


def optimal_gains(model, sol):
    """The optimal gain per state of an average-reward solution (0 at terminal states)."""
    terminal = {s["name"] for s in model["states"] if s.get("terminal", False)}
    return {s: 0.0 if s in terminal else solution_gain(sol, s) for s in sol["values"]}


def check_cli_verify_values(rep, schemas, binary, root, tmp, path, model, sol, sol_path):
    """`verify --values SOLUTION` passes with the numbers of the criterion; the same values
    with one state's value raised by 1 fail."""
    name = os.path.basename(path)
    kind = model["criterion"]["kind"]
    label = "verify %s --values SOLUTION" % name
    rc, doc = cli_document(rep, schemas, binary, root, ["verify", path, "--values", sol_path],
                           label, "verification.schema.json", (0,))
    if doc is not None:
        problems = []
        if doc["kind"] != "values" or doc["criterion"] != kind or doc["verdict"] != "pass":
            problems.append("kind %r, criterion %r, verdict %r"
                            % (doc["kind"], doc["criterion"], doc["verdict"]))
        if kind == "average":
            lo, hi = doc["gain_lower"], doc["gain_upper"]
            width = hi - lo
            gain = sol["average"]["gain"]
            if not lo - 1e-9 <= gain <= hi + 1e-9:
                problems.append("solution gain %r outside [%r, %r]" % (gain, lo, hi))
            if width > doc["tolerance"]:
                problems.append("passes with a bracket of width %r" % width)
            if not close(doc["max_residual"], width / 2, 1e-6) or \
                    not close(doc["greedy_policy_loss_bound"], width, 1e-6):
                problems.append("max_residual %r, greedy_policy_loss_bound %r, width %r"
                                % (doc["max_residual"], doc["greedy_policy_loss_bound"], width))
            over = [s for s, r in doc["residuals"].items() if r > width / 2 + 1e-9]
            if over:
                problems.append("residuals above half the width at %s" % over[:3])
        else:
            bound = doc["reference_distance"] + doc["reference_error_bound"]
            if doc["reference_distance"] > 1e-9 or not close(doc["value_error_bound"], bound):
                problems.append("reference_distance %r, value_error_bound %r"
                                % (doc["reference_distance"], doc["value_error_bound"]))
            if doc["greedy_policy_loss_bound"] is not None:
                problems.append("greedy_policy_loss_bound %r" % doc["greedy_policy_loss_bound"])
        if kind == "total":
            stuck = set(sol["total"]["not_reaching_goal"])
            if doc["states_not_reaching_goal"] != sol["total"]["states_not_reaching_goal"]:
                problems.append("states_not_reaching_goal %r" % doc["states_not_reaching_goal"])
            nulls = {s for s, r in doc["residuals"].items() if r is None}
            if nulls != stuck:
                problems.append("null residuals at %s, expected at %s"
                                % (sorted(nulls)[:3], sorted(stuck)[:3]))
        rep.check("%s: the %s numbers say it is exact" % (label, kind), not problems,
                  "; ".join(problems[:4]))

    # One value raised by 1: the first non-terminal state that has a value.
    terminal = {s["name"] for s in model["states"] if s.get("terminal", False)}
    target = next(s["name"] for s in model["states"]
                  if s["name"] not in terminal and sol["values"][s["name"]] is not None)
    values = dict(sol["values"])
    values[target] += 1.0
    candidate = {"format": "mdpserve/values@1", "values": values}
    errs = schemas.errors("values.schema.json", candidate)
    rep.check("perturbed values document for %s matches values.schema.json" % name, not errs,
              "; ".join("%s: %s" % e for e in errs[:3]))
    cpath = write_json(tmp, name.replace(".json", ".perturbed-values.json"), candidate)
    label = "verify %s --values (%s raised by 1)" % (name, target)
    rc, doc = cli_document(rep, schemas, binary, root, ["verify", path, "--values", cpath],
                           label, "verification.schema.json", (1,))
    if doc is None:
        return
    problems = []
    if doc["verdict"] != "fail":
        problems.append("verdict %r" % doc["verdict"])
    if kind == "average":
        if not doc["gain_upper"] - doc["gain_lower"] > doc["tolerance"]:
            problems.append("bracket [%r, %r] still within the tolerance"
                            % (doc["gain_lower"], doc["gain_upper"]))
    else:
        if not close(doc["reference_distance"], 1.0, 1e-9):
            problems.append("reference_distance %r, expected 1" % doc["reference_distance"])
        if kind == "finite_horizon" and \
                (not doc["worst_states"] or doc["worst_states"][0]["state"] != target):
            problems.append("worst state %r, expected %r"
                            % (doc["worst_states"][:1], target))
    rep.check("%s fails, off by what was added" % label, not problems, "; ".join(problems[:4]),
              info="verdict %s" % doc["verdict"])


def check_cli_verify_evaluate_policy(rep, schemas, binary, root, tmp, path, model, sol,
                                     sol_path):
    """`verify --policy SOLUTION` and `evaluate --policy SOLUTION`. Average and total: the
    solution's own policy passes and evaluates to its gain or values. Finite horizon: the
    solution's stage-0 picks, applied at every stage (a stationary policy), against V^pi_0
    computed here: the loss is what the stage-dependent optimum gains over it, and the verdict
    passes only when that is within the tolerance."""
    name = os.path.basename(path)
    kind = model["criterion"]["kind"]
    ref = reference_solvers(root)
    want_values, expected_loss = None, 0.0
    if kind == "finite_horizon":
        want_values = stationary_stage_zero(ref, model, sol["policy"])
        sign = 1.0 if model["objective"] == "maximize" else -1.0
        expected_loss = max(sign * (sol["values"][s] - want_values[s]) for s in want_values)
    label = "verify %s --policy SOLUTION" % name
    exits = (0,) if expected_loss <= 1e-9 else (1,)
    rc, doc = cli_document(rep, schemas, binary, root, ["verify", path, "--policy", sol_path],
                           label, "verification.schema.json", exits)
    if doc is not None:
        problems = []
        total = doc["max_loss"] + doc["evaluation_error_bound"] + \
            doc["optimal_value_error_bound"] if doc["max_loss"] is not None and \
            doc["evaluation_error_bound"] is not None and \
            doc["optimal_value_error_bound"] is not None else None
        verdict = "pass" if total is not None and total <= doc["tolerance"] else "fail"
        if doc["kind"] != "policy" or doc["criterion"] != kind or doc["verdict"] != verdict or \
                (rc == 0) != (verdict == "pass"):
            problems.append("kind %r, criterion %r, verdict %r (the sum of the terms is %r), "
                            "exit %r" % (doc["kind"], doc["criterion"], doc["verdict"], total, rc))
        if doc["suboptimal_count"] != 0 or doc["improper_count"] != 0:
            problems.append("suboptimal_count %r, improper_count %r"
                            % (doc["suboptimal_count"], doc["improper_count"]))
        if kind == "finite_horizon":
            if doc["max_loss"] is None or abs(doc["max_loss"] - expected_loss) > 1e-6:
                problems.append("max_loss %r, expected %r" % (doc["max_loss"], expected_loss))
            problems += far_apart(doc["values"], want_values, 1e-6, "V^pi_0")
        elif kind == "average":
            problems += far_apart(doc["values"], optimal_gains(model, sol),
                                  sol["average"]["gain_error_bound"] + 1e-9, "gain")
        else:
            problems += far_apart(doc["values"], sol["values"], 1e-6, "V^pi")
        rep.check("%s: verdict and loss as the %s criterion says" % (label, kind), not problems,
                  "; ".join(problems[:4]),
                  info="max_loss %s, verdict %s" % (doc["max_loss"], doc["verdict"]))

    label = "evaluate %s --policy SOLUTION" % name
    rc, doc = cli_document(rep, schemas, binary, root, ["evaluate", path, "--policy", sol_path],
                           label, "evaluation.schema.json", (0,))
    if doc is None:
        return
    problems = []
    if doc.get("criterion") != kind:
        problems.append("criterion %r" % doc.get("criterion"))
    if kind == "finite_horizon":
        problems += far_apart(doc["values"], want_values, 1e-6, "V^pi_0")
        if expected_loss <= 1e-9:
            problems += far_apart(doc["values"], sol["values"], 1e-6, "V^pi_0 vs solution")
    elif kind == "total":
        problems += far_apart(doc["values"], sol["values"], 1e-6, "V^pi")
        steps = {e["state"]: e["expected_steps"] for e in sol["states"]}
        problems += far_apart(doc["expected_steps"], steps, 1e-6, "expected_steps")
        stuck = sol["total"]["not_reaching_goal"]
        if doc["improper_states"] != stuck or doc["improper_count"] != len(stuck):
            problems.append("improper_states %r (%r), expected %r (the states left out of the "
                            "solution's policy cannot reach a goal)"
                            % (doc["improper_states"][:3], doc["improper_count"], stuck[:3]))
    else:
        problems += far_apart(doc["gains"], optimal_gains(model, sol),
                              sol["average"]["gain_error_bound"] + 1e-9, "gain")
        got = sorted(sorted(c["states"]) for c in doc["recurrent_classes"])
        expected = sorted(sorted(c["states"]) for c in sol["average"]["recurrent_classes"])
        if got != expected:
            problems.append("recurrent classes %r, the solution's %r" % (got[:2], expected[:2]))
        if len(expected) == 1:
            # One class: the bias is fixed up to a constant, so it differs from the
            # solution's by the same amount in every state.
            shift = [doc["values"][s] - v for s, v in sol["values"].items()]
            if max(shift) - min(shift) > 1e-6:
                problems.append("bias differs from the solution's by %r to %r"
                                % (min(shift), max(shift)))
    rep.check("%s agrees with the solution (%s)" % (label, kind), not problems,
              "; ".join(problems[:4]))


def check_cli_total_improper(rep, schemas, binary, root, tmp, path, model, sol):
    """Total reward: the solution's policy with one state switched to an action that stays
    there for ever (a state that can reach a goal) is improper there: `verify --policy` fails
    listing it, `evaluate` has no value for it."""
    name = os.path.basename(path)
    loop = None
    for s in model["states"]:
        if s.get("terminal", False) or sol["values"].get(s["name"]) is None:
            continue
        for sa in s.get("actions", []):
            if all(o["next"] == s["name"] for o in sa["outcomes"] if o["probability"] > 0):
                loop = (s["name"], sa["action"])
                break
        if loop:
            break
    if not rep.check("%s has a state that can reach a goal and an action that stays there"
                     % name, loop is not None, "none found"):
        return
    state, action = loop
    policy = dict(sol["policy"])
    policy[state] = action
    candidate = {"format": "mdpserve/policy@1", "policy": policy}
    errs = schemas.errors("policy.schema.json", candidate)
    rep.check("looping policy for %s matches policy.schema.json" % name, not errs,
              "; ".join("%s: %s" % e for e in errs[:3]))
    cpath = write_json(tmp, name.replace(".json", ".looping-policy.json"), candidate)
    label = "verify %s --policy (%s: %s for ever)" % (name, state, action)
    rc, doc = cli_document(rep, schemas, binary, root, ["verify", path, "--policy", cpath],
                           label, "verification.schema.json", (1,))
    if doc is not None:
        rep.check("%s fails with %s improper (infinite loss, null)" % (label, state),
                  doc["verdict"] == "fail" and state in doc["improper_states"] and
                  doc["improper_count"] >= 1 and doc["max_loss"] is None and
                  doc["losses"][state] is None and doc["values"][state] is None,
                  "verdict %r, improper %r (%r), max_loss %r, loss %r"
                  % (doc["verdict"], doc["improper_states"][:5], doc["improper_count"],
                     doc["max_loss"], doc["losses"].get(state)),
                  info="improper %s" % doc["improper_states"][:5])
    label = "evaluate %s --policy (%s: %s for ever)" % (name, state, action)
    rc, doc = cli_document(rep, schemas, binary, root, ["evaluate", path, "--policy", cpath],
                           label, "evaluation.schema.json", (0,))
    if doc is not None:
        rep.check("%s lists %s as improper, without value or step count" % (label, state),
                  state in doc["improper_states"] and doc["values"][state] is None and
                  doc["expected_steps"][state] is None and
                  doc["improper_count"] == len(doc["improper_states"]),
                  "improper %r, value %r, steps %r"
                  % (doc["improper_states"][:5], doc["values"].get(state),
                     doc["expected_steps"].get(state)))


def check_cli_criterion_simulate(rep, schemas, binary, root, tmp, path, model, sol):
    """`simulate` without a policy file follows a fresh solve's own decisions (per stage for a
    finite horizon) from the model's first state. Its 99.9% interval must contain the exact
    value: the solution's value of the start (finite horizon: V*_0; total: V*), or its gain
    (average, with a bias allowance 2 max|h| / max_steps for the finite run)."""
    name = os.path.basename(path)
    kind = model["criterion"]["kind"]
    start = model["states"][0]["name"]
    cmd = [binary, "simulate", path, "--episodes", str(SIM_EPISODES), "--seed", "23",
           "--confidence", str(SIM_CONFIDENCE)]
    slack = 0.0
    if kind == "average":
        cmd += ["--max-steps", str(SIM_AVERAGE_STEPS)]
        exact = solution_gain(sol, start)
        slack = 2.0 * max(abs(v) for v in sol["values"].values()) / SIM_AVERAGE_STEPS
    else:
        exact = sol["values"][start]
    what = "simulate %s (the solution's decisions)" % name
    rc, out, err = run(cmd, root)
    if not rep.check("%s exits 0" % what, rc == 0, "exit %r; %s" % (rc, short(err))):
        return
    doc = validated_output(rep, schemas, what, "simulation.schema.json", out)
    if doc is None:
        return
    want_kind = {"average": "reward_per_step", "finite_horizon": "horizon_sum",
                 "total": "total_until_goal"}[kind]
    problems = []
    if doc["return_kind"] != want_kind:
        problems.append("return_kind %r" % doc["return_kind"])
    if doc["outcome"] != "completed" or doc["episodes"] != SIM_EPISODES or \
            doc["options"]["start"] != {start: 1.0}:
        problems.append("outcome %r, %r episodes, start %r"
                        % (doc["outcome"], doc["episodes"], doc["options"]["start"]))
    length = doc["episode_length"]
    if length["truncated_episodes"] != 0:
        problems.append("%r truncated episodes" % length["truncated_episodes"])
    if kind == "finite_horizon" and not length["mean"] <= model["criterion"]["horizon"]:
        problems.append("mean length %r beyond the horizon" % length["mean"])
    if kind == "average" and not length["mean"] <= SIM_AVERAGE_STEPS:
        problems.append("mean length %r beyond max_steps" % length["mean"])
    ci = doc["return"]["confidence_interval"]
    if not ci["low"] - slack <= exact <= ci["high"] + slack:
        problems.append("exact %r outside [%r, %r] (allowance %r)"
                        % (exact, ci["low"], ci["high"], slack))
    rep.check("%s: the %.1f%% interval contains the exact %s" % (
        what, 100 * SIM_CONFIDENCE, "gain" if kind == "average" else "value of " + start),
        not problems, "; ".join(problems[:4]),
        info="mean %.6g, exact %.6g, half-width %.3g" % (
            doc["return"]["mean"], exact, (ci["high"] - ci["low"]) / 2))
    rc, again, err = run(cmd, root)
    second, _ = parse_json(again) if rc == 0 else (None, err)
    rep.check("%s is reproduced by a rerun with the same seed" % what,
              second is not None and
              dict(second, simulate_seconds=0) == dict(doc, simulate_seconds=0),
              "exit %r; %s" % (rc, short(err)))


def check_cli_criterion_runs(rep, schemas, binary, root, tmp, path, model, sol, sol_path):
    """verify, evaluate and simulate on an example of the average, finite_horizon or total
    criterion (a finite horizon also as a one-period variant, whose stationary policy is
    optimal), every output validated against its schema."""
    name = os.path.basename(path)
    for fname in ("values.schema.json", "policy.schema.json"):
        errs = schemas.errors(fname, sol)
        rep.check("solution of %s is accepted as a candidate by %s" % (name, fname), not errs,
                  "; ".join("%s: %s" % e for e in errs[:3]))
    check_cli_verify_values(rep, schemas, binary, root, tmp, path, model, sol, sol_path)
    check_cli_verify_evaluate_policy(rep, schemas, binary, root, tmp, path, model, sol,
                                     sol_path)
    kind = model["criterion"]["kind"]
    if kind == "total":
        check_cli_total_improper(rep, schemas, binary, root, tmp, path, model, sol)
    check_cli_criterion_simulate(rep, schemas, binary, root, tmp, path, model, sol)
    if kind == "finite_horizon" and model["criterion"]["horizon"] > 1:
        short_model = copy.deepcopy(model)
        short_model["criterion"]["horizon"] = 1
        short_path = write_json(tmp, name.replace(".json", "-horizon-1.json"), short_model)
        label = "solve %s with horizon 1" % name
        short_sol_path = os.path.join(tmp, name.replace(".json", "-horizon-1.solution.json"))
        rc, _, err = run([binary, "solve", short_path, "--out", short_sol_path], root)
        if rep.check("%s exits 0" % label, rc == 0, "exit %r; %s" % (rc, short(err))):
            with open(short_sol_path, encoding="utf-8") as fh:
                short_sol = validated_output(rep, schemas, label, "solution.schema.json",
                                             fh.read())
            if short_sol is not None:
                check_cli_verify_values(rep, schemas, binary, root, tmp, short_path,
                                        short_model, short_sol, short_sol_path)
                check_cli_verify_evaluate_policy(rep, schemas, binary, root, tmp, short_path,
                                                 short_model, short_sol, short_sol_path)


def check_cli_unbounded_total(rep, schemas, binary, root, tmp):
    """BASE_MODEL under the total criterion: the loop a <-> b earns reward, so maximising is
    refused at solve time naming the loop, while minimising (the rewards become costs, the
    loop a cost) is solved."""
    doc = variant(_set(["criterion"], {"kind": "total"}))
    path = os.path.join(tmp, "unbounded-total.json")
    with open(path, "w", encoding="utf-8") as fh:
        json.dump(doc, fh)
    rc, _, err = run([binary, "solve", path], root)
    rep.check("solve refuses a total-reward model whose loop earns reward (exit 2, loop named)",
              rc == 2 and "unbounded" in err and '"a": "stay"' in err and '"b": "stay"' in err,
              "exit %r; %s" % (rc, short(err)))
    doc["objective"] = "minimize"
    with open(path, "w", encoding="utf-8") as fh:
        json.dump(doc, fh)
    label = "solve of its cost-minimising twin"
    sol = solve_to_document(rep, schemas, binary, root, tmp, path, [], label)
    if sol is not None:
        check_solution_content(rep, label, doc, sol, {})
        check_total(rep, label, doc, sol, reference_solvers(root))


def check_cli_example(rep, schemas, binary, root, tmp, path):
    name = os.path.basename(path)
    label = name
    with open(path, encoding="utf-8") as fh:
        model = json.load(fh)
    nonterminal = [s["name"] for s in model["states"] if not s.get("terminal", False)]

    rc, out, err = run([binary, "validate", path], root)
    if rep.check("validate %s exits 0" % name, rc == 0, "exit %r; %s" % (rc, short(err))):
        doc = validated_output(rep, schemas, "validate %s" % name, "errors.schema.json", out)
        if doc is not None:
            rep.check("validate %s reports no errors" % name,
                      not doc["errors"] and doc["truncated"] == 0,
                      "; ".join("%s: %s" % (e["pointer"], e["message"])
                                for e in doc["errors"][:3]),
                      info="%d warnings" % len(doc["warnings"]))

    sol_path = os.path.join(tmp, name.replace(".json", ".solution.json"))
    rc, out, err = run([binary, "solve", path, "--out", sol_path], root)
    if not rep.check("solve %s exits 0" % name, rc == 0, "exit %r; %s" % (rc, short(err))):
        return
    try:
        with open(sol_path, encoding="utf-8") as fh:
            text = fh.read()
    except OSError as e:
        rep.check("solve %s writes --out" % name, False, str(e))
        return
    sol = validated_output(rep, schemas, "solve %s" % name, "solution.schema.json", text)
    if sol is None:
        return
    check_solution_content(rep, "solve %s" % label, model, sol, EXPECTED_TIES.get(name, {}))
    if model["criterion"]["kind"] != "discounted":
        check_cli_criterion(rep, schemas, binary, root, tmp, path, model, sol)
        check_cli_criterion_runs(rep, schemas, binary, root, tmp, path, model, sol, sol_path)
        return

    for kind in ("values", "policy"):
        rc, out, err = run([binary, "verify", path, "--" + kind, sol_path], root)
        what = "verify %s --%s" % (name, kind)
        if not rep.check("%s exits 0 or 1" % what, rc in (0, 1),
                         "exit %r; %s" % (rc, short(err))):
            continue
        doc = validated_output(rep, schemas, what, "verification.schema.json", out)
        if doc is None:
            continue
        rep.check("%s reports kind %s with a verdict matching the exit code" % (what, kind),
                  doc["kind"] == kind and doc["verdict"] == ("pass" if rc == 0 else "fail"),
                  "kind %r, verdict %r, exit %d" % (doc["kind"], doc["verdict"], rc),
                  info="verdict %s" % doc["verdict"])
        if kind == "policy":
            missing = [s for s in nonterminal if s not in doc["values"]]
            rep.check("%s gives V^pi for every non-terminal state" % what, not missing,
                      "missing %s" % missing[:3])

    what = "evaluate %s --policy" % name
    rc, out, err = run([binary, "evaluate", path, "--policy", sol_path], root)
    if rep.check("%s exits 0" % what, rc == 0, "exit %r; %s" % (rc, short(err))):
        doc = validated_output(rep, schemas, what, "evaluation.schema.json", out)
        if doc is not None:
            far = []
            for s in nonterminal:
                if s not in doc["values"] or s not in sol["values"]:
                    far.append("%s missing" % s)
                    continue
                slack = doc["value_error_bound"]
                for b in ("value_error_bound", "policy_loss_bound"):
                    slack += sol[b] if sol[b] is not None else float("inf")
                v, w = doc["values"][s], sol["values"][s]
                if abs(v - w) > slack + 1e-9 * (1.0 + abs(w)):
                    far.append("%s: V^pi %r vs V %r" % (s, v, w))
            rep.check("%s agrees with the solved values within the bounds" % what, not far,
                      "; ".join(far[:3]))
    check_cli_simulate(rep, schemas, binary, root, tmp, path, model, sol_path)


def check_cli_simulate(rep, schemas, binary, root, tmp, path, model, sol_path):
    """Simulates the solved policy from an even split over the first two non-terminal states
    and checks the document against the schema, the exact V^pi and a rerun."""
    name = os.path.basename(path)
    starts = [s["name"] for s in model["states"] if not s.get("terminal", False)][:2]
    start_doc = {"format": "mdpserve/start@1", "start": {s: 1.0 / len(starts) for s in starts}}
    errs = schemas.errors("start.schema.json", start_doc)
    rep.check("start distribution for %s matches start.schema.json" % name, not errs,
              "; ".join("%s: %s" % e for e in errs[:3]))
    start_path = os.path.join(tmp, name.replace(".json", ".start.json"))
    with open(start_path, "w", encoding="utf-8") as fh:
        json.dump(start_doc, fh)
    cmd = [binary, "simulate", path, "--solution", sol_path, "--start-distribution",
           start_path, "--episodes", "4000", "--seed", "11", "--confidence", "0.999"]
    what = "simulate %s" % name
    rc, out, err = run(cmd, root)
    if not rep.check("%s exits 0" % what, rc == 0, "exit %r; %s" % (rc, short(err))):
        return
    doc = validated_output(rep, schemas, what, "simulation.schema.json", out)
    if doc is None:
        return
    rc, exact_out, err = run([binary, "evaluate", path, "--policy", sol_path], root)
    exact, _ = parse_json(exact_out) if rc == 0 else (None, err)
    problems = []
    if doc["outcome"] != "completed" or doc["episodes"] != 4000:
        problems.append("outcome %r after %r episodes" % (doc["outcome"], doc["episodes"]))
    if doc["options"]["start"] != start_doc["start"]:
        problems.append("options.start %r" % doc["options"]["start"])
    ret, visits = doc["return"], doc["visits"]
    levels = [q["value"] for q in ret["quantiles"]]
    if levels != sorted(levels) or not ret["min"] <= levels[0] <= levels[-1] <= ret["max"]:
        problems.append("quantiles %r outside [min, max] or not increasing" % levels)
    share = sum(v["frequency"] for v in visits["most_visited"]) + visits["unlisted_frequency"]
    if abs(share - 1.0) > 1e-9:
        problems.append("visit frequencies sum to %r" % share)
    terminal = {s["name"] for s in model["states"] if s.get("terminal", False)}
    if any(v["state"] in terminal for v in visits["most_visited"]):
        problems.append("a terminal state is listed as visited")
    if exact is None:
        problems.append("evaluate failed: %s" % short(err))
    else:
        v_pi = sum(p * exact["values"][s] for s, p in start_doc["start"].items())
        slack = doc["truncation_bias_bound"]
        ci = ret["confidence_interval"]
        if not ci["low"] - slack <= v_pi <= ci["high"] + slack:
            problems.append("exact V^pi %r outside the interval [%r, %r]"
                            % (v_pi, ci["low"], ci["high"]))
    rep.check("%s agrees with the model and with evaluate" % what, not problems,
              "; ".join(problems[:4]), info="mean %.6g" % ret["mean"])
    rc, again, err = run(cmd, root)
    second, _ = parse_json(again) if rc == 0 else (None, err)
    same = second is not None and \
        dict(second, simulate_seconds=0) == dict(doc, simulate_seconds=0)
    rep.check("%s is reproduced by a rerun with the same seed" % what, same,
              "exit %r; %s" % (rc, short(err)))


POINTER_RE = re.compile(r"^(/([^~/]|~[01])*)*$")


def stderr_pointers(stderr, path):
    """Pointers of the `POINTER: message` lines on stderr. Tolerated variations: a leading
    `PATH: ` naming the input file (compiler style) and `(document)` for the empty pointer."""
    pointers = []
    for line in stderr.splitlines():
        if line.startswith(path + ": "):
            line = line[len(path) + 2:]
        if ": " not in line:
            continue
        pointer = line.split(": ", 1)[0]
        if pointer == "(document)":
            pointer = ""
        if POINTER_RE.match(pointer):
            pointers.append(pointer)
    return pointers


def check_cli_refusals(rep, schemas, binary, root, tmp):
    cases = [(label, json.dumps(doc), expected) for label, doc, expected in SCHEMA_BAD]
    cases += DECODER_BAD
    for i, (label, text, expected) in enumerate(cases):
        path = os.path.join(tmp, "bad-%02d.json" % i)
        with open(path, "w", encoding="utf-8") as fh:
            fh.write(text)
        what = "validate refuses %s" % label
        rc, out, err = run([binary, "validate", path], root)
        if not rep.check("%s (non-zero exit)" % what, rc not in (None, 0) and 0 < rc < 128,
                         "exit %r; %s" % (rc, short(err))):
            continue
        doc = validated_output(rep, schemas, what, "errors.schema.json", out)
        if doc is None:
            continue
        pointers = [e["pointer"] for e in doc["errors"]]
        rep.check("%s at or under %r" % (what, expected),
                  any(within(p, expected) for p in pointers), "errors at %s" % pointers[:5])
        what = "solve refuses %s" % label
        rc, out, err = run([binary, "solve", path, "--out", path + ".out"], root)
        pointers = stderr_pointers(err, path)
        rep.check("%s with POINTER: message on stderr" % what,
                  rc not in (None, 0) and 0 < rc < 128
                  and any(within(p, expected) for p in pointers),
                  "exit %r; stderr: %s" % (rc, short(err)))
    accepted = [(label, doc, None) for label, doc in SCHEMA_GOOD] + WARNING_MODELS
    for i, (label, doc, warning) in enumerate(accepted):
        path = os.path.join(tmp, "good-%02d.json" % i)
        with open(path, "w", encoding="utf-8") as fh:
            json.dump(doc, fh)
        what = "validate accepts %s" % label
        rc, out, err = run([binary, "validate", path], root)
        if not rep.check("%s (exit 0)" % what, rc == 0, "exit %r; %s" % (rc, short(err))):
            continue
        out_doc = validated_output(rep, schemas, what, "errors.schema.json", out)
        if out_doc is None:
            continue
        rep.check("%s without errors" % what, not out_doc["errors"],
                  "errors at %s" % [e["pointer"] for e in out_doc["errors"]][:5])
        if warning is not None:
            pointers = [w["pointer"] for w in out_doc["warnings"]]
            rep.check("%s with a warning at or under %r" % (what, warning),
                      any(within(p, warning) for p in pointers), "warnings at %s" % pointers)


# --------------------------------------------------------------------------------------------

def main():
    ap = argparse.ArgumentParser(description="Check mdpserve's schemas, examples and CLI output.")
    ap.add_argument("--root", default=os.path.join(os.path.dirname(os.path.abspath(__file__)),
                                                   "..", ".."),
                    help="repository root (default: two levels above this script)")
    ap.add_argument("--mdpserve", help="path of the mdpserve binary; enables the CLI checks")
    args = ap.parse_args()
    root = os.path.abspath(args.root)
    rep = Report()

    schemas = check_schema_files(rep, root)
    if schemas is not None:
        check_examples(rep, root, schemas)
        check_bad_models(rep, schemas)
        check_other_documents(rep, schemas)
        binary = os.path.abspath(args.mdpserve) if args.mdpserve else None
        with tempfile.TemporaryDirectory(prefix="mdpserve-arrays-") as tmp:
            check_arrays_encoding(rep, schemas, binary, root, tmp)
        if args.mdpserve:
            binary = os.path.abspath(args.mdpserve)
            if rep.check("mdpserve binary is executable", os.access(binary, os.X_OK), binary):
                with tempfile.TemporaryDirectory(prefix="mdpserve-schema-") as tmp:
                    for path in sorted(glob.glob(os.path.join(root, "api-schema", "examples",
                                                              "*.json"))):
                        check_cli_example(rep, schemas, binary, root, tmp, path)
                    check_cli_unbounded_total(rep, schemas, binary, root, tmp)
                    check_cli_refusals(rep, schemas, binary, root, tmp)

    print("%d passed, %d failed" % (rep.passed, rep.failed))
    return 1 if rep.failed else 0


if __name__ == "__main__":
    sys.exit(main())
