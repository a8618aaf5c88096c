#!/usr/bin/python3
"""Convert a model document between its object and its compact (arrays) encoding.

    /usr/bin/python3 scripts/model_to_arrays.py [--to arrays|object] IN OUT

IN and OUT are file names; "-" reads standard input or writes standard output. The direction
follows IN's `format`: a `mdpserve/model@1` document (api-schema/model.schema.json) becomes a
`mdpserve/model-arrays@1` document (api-schema/model-arrays.schema.json), and the reverse.
`--to` states the expected output encoding and refuses an input that is already in it.

mdpserve decodes both encodings of one model to the same model, with the same canonical
document and the same model id. The converter checks only what it needs in order to convert
(the input is JSON, names and indices resolve, array lengths agree, objects have no unknown
members, numbers are finite); `mdpserve validate OUT` checks every rule of the format.
Errors are printed as `model_to_arrays: IN: POINTER: message` (exit status 1).

Python's json module holds the whole document in memory: expect several times the file's
size. Writers of very large models should write the arrays encoding directly.
"""

import argparse
import json
import math
import sys

OBJECT_FORMAT = "mdpserve/model@1"
ARRAYS_FORMAT = "mdpserve/model-arrays@1"
HEADER = ["name", "description", "reward_unit", "objective", "criterion", "actions"]
CHUNK = 65536  # Array items written per write() call.


class ConvertError(Exception):
    def __init__(self, pointer, message):
        super().__init__(message)
        self.pointer = pointer
        self.message = message


def escape(token):
    """One RFC 6901 reference token."""
    return str(token).replace("~", "~0").replace("/", "~1")


def reject_constant(name):
    raise ConvertError("", "malformed JSON: %s is not a JSON value" % name)


def no_duplicates(pairs):
    seen = {}
    for key, value in pairs:
        if key in seen:
            raise ConvertError("", "duplicate key '%s'" % key)
        seen[key] = value
    return seen


def load(path):
    try:
        stream = sys.stdin if path == "-" else open(path, encoding="utf-8")
        with stream:
            return json.load(stream, object_pairs_hook=no_duplicates,
                             parse_constant=reject_constant)
    except json.JSONDecodeError as e:
        raise ConvertError("", "malformed JSON at line %d, column %d: %s" % (e.lineno, e.colno,
                                                                             e.msg))
    except (OSError, UnicodeDecodeError) as e:
        raise ConvertError("", "cannot read: %s" % e)


def need(condition, pointer, message):
    if not condition:
        raise ConvertError(pointer, message)


def check_keys(obj, pointer, allowed):
    need(isinstance(obj, dict), pointer, "must be an object")
    for key in obj:
        need(key in allowed, pointer + "/" + escape(key), "unknown field")


def number(value, pointer):
    need(isinstance(value, (int, float)) and not isinstance(value, bool), pointer,
         "must be a number")
    need(math.isfinite(value), pointer, "must be a finite number")
    return value


def index(value, pointer, count, what):
    need(isinstance(value, int) and not isinstance(value, bool), pointer,
         "must be an integer index")
    need(0 <= value < count, pointer, "%s index %d is out of range (%d %ss)" % (what, value,
                                                                               count, what))
    return value


def array(doc, key, required=True):
    if key not in doc:
        need(not required, "/" + key, "required field is missing")
        return None
    need(isinstance(doc[key], list), "/" + key, "must be an array")
    return doc[key]


def lookup(names, name, pointer, what):
    need(isinstance(name, str), pointer, "must be a string")
    need(name in names, pointer, "%s '%s' is not defined" % (what, name))
    return names[name]


def first_index(names):
    """name -> index of its first occurrence."""
    out = {}
    for i, name in enumerate(names):
        if isinstance(name, str):
            out.setdefault(name, i)
    return out


def to_arrays(doc):
    """An object-encoded model as a dict of the arrays encoding."""
    check_keys(doc, "", {"format"} | set(HEADER) | {"states"})
    out = {"format": ARRAYS_FORMAT}
    out.update((key, doc[key]) for key in HEADER if key in doc)
    catalogue = first_index(array(doc, "actions"))
    states = array(doc, "states")
    for s, st in enumerate(states):
        check_keys(st, "/states/%d" % s, {"name", "description", "terminal", "actions"})
        need("name" in st, "/states/%d/name" % s, "required field is missing")
    names = [st["name"] for st in states]
    state_index = first_index(names)
    columns = {key: [] for key in ["sa_state", "sa_action", "sa_reward", "sa_outcomes", "next",
                                   "probability", "reward"]}
    has_sa_reward = has_reward = False
    for s, st in enumerate(states):
        need(isinstance(st.get("actions", []), list), "/states/%d/actions" % s, "must be an array")
        for k, act in enumerate(st.get("actions", [])):
            ptr = "/states/%d/actions/%d" % (s, k)
            check_keys(act, ptr, {"action", "reward", "outcomes"})
            columns["sa_state"].append(s)
            columns["sa_action"].append(lookup(catalogue, act.get("action"), ptr + "/action",
                                               "action"))
            has_sa_reward = has_sa_reward or "reward" in act
            columns["sa_reward"].append(number(act.get("reward", 0), ptr + "/reward"))
            need(isinstance(act.get("outcomes"), list), ptr + "/outcomes", "must be an array")
            columns["sa_outcomes"].append(len(act["outcomes"]))
            for j, o in enumerate(act["outcomes"]):
                optr = "%s/outcomes/%d" % (ptr, j)
                check_keys(o, optr, {"next", "probability", "reward"})
                columns["next"].append(lookup(state_index, o.get("next"), optr + "/next",
                                              "state"))
                columns["probability"].append(number(o.get("probability"),
                                                     optr + "/probability"))
                has_reward = has_reward or "reward" in o
                columns["reward"].append(number(o.get("reward", 0), optr + "/reward"))
    out["states"] = names
    if any("description" in st for st in states):
        out["state_descriptions"] = [st.get("description") for st in states]
    terminal = [s for s, st in enumerate(states) if st.get("terminal") is True]
    if terminal:
        out["terminal"] = terminal
    if not has_sa_reward:
        del columns["sa_reward"]
    if not has_reward:
        del columns["reward"]
    out.update(columns)
    return out


def to_object(doc):
    """An arrays-encoded model as a dict of the object encoding."""
    check_keys(doc, "", {"format", "states", "state_descriptions", "terminal", "sa_state",
                         "sa_action", "sa_reward", "sa_outcomes", "next", "probability",
                         "reward"} | set(HEADER))
    out = {"format": OBJECT_FORMAT}
    out.update((key, doc[key]) for key in HEADER if key in doc)
    catalogue = array(doc, "actions")
    names = array(doc, "states")
    n = len(names)
    states = [{"name": name} for name in names]
    descriptions = array(doc, "state_descriptions", required=False)
    if descriptions is not None:
        need(len(descriptions) == n, "/state_descriptions", "needs one item per state")
        for st, text in zip(states, descriptions):
            if text is not None:
                st["description"] = text
    for k, s in enumerate(array(doc, "terminal", required=False) or []):
        states[index(s, "/terminal/%d" % k, n, "state")]["terminal"] = True
    rows = array(doc, "sa_state")
    outcomes = array(doc, "next")
    for key, size in [("sa_action", len(rows)), ("sa_reward", len(rows)),
                      ("sa_outcomes", len(rows)), ("probability", len(outcomes)),
                      ("reward", len(outcomes))]:
        column = array(doc, key, required=key not in ("sa_reward", "reward"))
        need(column is None or len(column) == size, "/" + key,
             "has %d items, expected %d" % (len(column or []), size))
    first = 0
    previous = 0
    for k, s in enumerate(rows):
        s = index(s, "/sa_state/%d" % k, n, "state")
        need(s >= previous, "/sa_state/%d" % k, "sa_state must not decrease")
        previous = s
        count = doc["sa_outcomes"][k]
        need(isinstance(count, int) and not isinstance(count, bool) and count >= 0,
             "/sa_outcomes/%d" % k, "must be a non-negative integer")
        need(first + count <= len(outcomes), "/sa_outcomes/%d" % k, "more outcomes than next has")
        row = {"action": catalogue[index(doc["sa_action"][k], "/sa_action/%d" % k,
                                         len(catalogue), "action")]}
        if "sa_reward" in doc and number(doc["sa_reward"][k], "/sa_reward/%d" % k) != 0:
            row["reward"] = doc["sa_reward"][k]  # A reward of 0 is the default: left out.
        row["outcomes"] = []
        for o in range(first, first + count):
            outcome = {"next": names[index(outcomes[o], "/next/%d" % o, n, "state")],
                       "probability": number(doc["probability"][o], "/probability/%d" % o)}
            if "reward" in doc and number(doc["reward"][o], "/reward/%d" % o) != 0:
                outcome["reward"] = doc["reward"][o]
            row["outcomes"].append(outcome)
        states[s].setdefault("actions", []).append(row)
        first += count
    need(first == len(outcomes), "/sa_outcomes", "the counts add up to %d outcomes, but next has "
         "%d items" % (first, len(outcomes)))
    out["states"] = states
    return out


def write_value(stream, value):
    if isinstance(value, list) and len(value) > CHUNK:
        stream.write("[")
        for start in range(0, len(value), CHUNK):
            if start:
                stream.write(",")
            stream.write(",".join(json.dumps(v) for v in value[start:start + CHUNK]))
        stream.write("]")
    else:
        stream.write(json.dumps(value, ensure_ascii=False))


def write_arrays(stream, doc):
    """One member per line, arrays on one line each (short for its size, and diffable)."""
    stream.write("{\n")
    for i, (key, value) in enumerate(doc.items()):
        stream.write(" %s: " % json.dumps(key))
        write_value(stream, value)
        stream.write(",\n" if i + 1 < len(doc) else "\n")
    stream.write("}\n")


def convert(args):
    doc = load(args.input)
    need(isinstance(doc, dict), "", "a model document must be a JSON object")
    fmt = doc.get("format")
    need(fmt in (OBJECT_FORMAT, ARRAYS_FORMAT), "/format",
         "must be '%s' or '%s'" % (OBJECT_FORMAT, ARRAYS_FORMAT))
    target = "arrays" if fmt == OBJECT_FORMAT else "object"
    need(args.to in (None, target), "/format", "the input is already in the %s encoding"
         % args.to)
    out = to_arrays(doc) if target == "arrays" else to_object(doc)
    stream = sys.stdout if args.output == "-" else open(args.output, "w", encoding="utf-8")
    with stream:
        if target == "arrays":
            write_arrays(stream, out)
        else:
            json.dump(out, stream, indent=1, ensure_ascii=False)
            stream.write("\n")


def main():
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--to", choices=["arrays", "object"],
                        help="the expected output encoding (default: the other one)")
    parser.add_argument("input", metavar="IN")
    parser.add_argument("output", metavar="OUT")
    args = parser.parse_args()
    try:
        convert(args)
    except ConvertError as e:
        print("model_to_arrays: %s: %s: %s" % (args.input, e.pointer or "(document)", e.message),
              file=sys.stderr)
        return 1
    except (TypeError, KeyError, IndexError, AttributeError) as e:
        # A member of an unexpected type deep inside; mdpserve validate says exactly where.
        print("model_to_arrays: %s: (document): not a well-formed model (%s: %s); run mdpserve "
              "validate on it" % (args.input, type(e).__name__, e), file=sys.stderr)
        return 1
    return 0


if __name__ == "__main__":
    sys.exit(main())
