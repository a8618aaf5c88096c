#!/usr/bin/python3
"""Integration tests of the real mdpserve HTTP service.

    /usr/bin/python3 tests/api/service_test.py --mdpserve PATH_TO_BINARY --root REPO

Starts `mdpserve serve` processes on 127.0.0.1 with ephemeral ports (--listen 127.0.0.1:0
--port-file FILE) and checks, against api-schema/openapi.json:
  (0) the OpenAPI document: it covers every route of server/routes.cc, describes everything,
      its schemas are valid 2020-12 schemas, and the served /v1/openapi.json is the file;
  (a) the workflow: upload (201/200, Location, content ids stable under whitespace and key
      order), list, get, document, solve job (202, poll until succeeded), best actions for
      every state compared with an independent value iteration written here in plain Python,
      batch, explain (q = expected_reward + discounted_next_value), solution list, report and
      tables, verify (the solution's own values and policy pass, a perturbed policy fails
      and names the state), the same solve again answers 200 cached;
  (b) restart: SIGTERM exits 0 within a bound; a new process on the same --data-dir has the
      solved models and their solutions cached before any query (warm start) and gives
      byte-identical answers;
  (c) kill -9 during a solve: after a restart the job is failed with a reason naming the
      stop, and the store is intact (models listed, earlier answers identical, writable);
  (d) concurrent best-action queries (bounded count) while a slow solve runs: all 200 and
      identical to the sequential answers;
  (e) a table of bad requests, each with its status and problem type (including 413 with a
      small --body-limit and 429 with --workers 1 --queue-length 1); afterwards the server
      still answers;
  (f) bearer token on (401 with WWW-Authenticate without or with a wrong token, 200 with the
      right one, /healthz and /readyz open) and off (no header needed);
  (g) /metrics: request counters and duration histograms per route equal to the requests
      this test made, queue and cache gauges, the job duration histogram after solves;
  (h) the other criteria, on small models whose answers are derived by hand in their
      docstrings: finite-horizon queries by stage and periods remaining (batch, explain,
      tables), the average criterion's gain, total cost to a goal with unsafe actions and a
      state that cannot reach it, and the solves that must fail (a reward loop avoiding the
      goal; a method of another criterion);
  (i) the store's value limit (memory and SQLite stores);
  (j) connections: 50 silent or half-sent connections on 2 HTTP threads do not stop a new
      request, nor do 3 clients that pipeline 200 requests each and read nothing; pipelined
      GET, HEAD, GET answered in order; framing errors (505, 501, 400, 431) as problems;
      Expect: 100-continue, under and over the body limit; 60 garbage requests; the idle
      timeout closes silent and kept-alive connections;
  (k) large requests on a 1-thread server: a query is answered while a large upload is
      parsed, 6 large uploads at once (3 taken, the others 429), the info-level log, and the
      threads' names and nice values after a 2-thread solve (mdp-http at the process's value,
      mdp-upload and mdp-solve, the solve's OpenMP thread included, 10 higher), and the
      OpenMP spin count it set itself (GOMP_SPINCOUNT=5000); a server given
      OMP_WAIT_POLICY keeps it and gets no spin count.
Every JSON body received is validated against the OpenAPI response schema of its operation
and status (Draft 2020-12; the api-schema/*.schema.json files are resolved by their $id).

Every process started is stopped by its PID, also on failure. Prints one line per check and
ends with `N passed, M failed`; exits 1 when anything failed. Uses only the standard library
and jsonschema (Debian's python3-jsonschema). Models are invented: the repository's demo
models and seeded random models generated here.
"""

import argparse
import collections
import glob
import http.client
import json
import os
import random
import re
import signal
import socket
import subprocess
import sys
import tempfile
import threading
import time
import urllib.parse

from jsonschema import Draft202012Validator, RefResolver

OPENAPI_BASE = "https://mdpserve.invalid/api/openapi.json"
PROBLEM = "urn:mdpserve:problem:"
START_TIMEOUT = 20.0     # seconds for a server to write its port file
STOP_TIMEOUT = 15.0      # seconds for SIGTERM to end a server
JOB_TIMEOUT = 60.0       # seconds for a quick solve job to finish
HTTP_TIMEOUT = 60.0      # seconds per HTTP request
VALUE_TOLERANCE = 1e-6   # agreement with the independent value iteration


# --------------------------------------------------------------------------------------------
# Reporting

class Report:
    def __init__(self):
        self.passed = 0
        self.failed = 0
        self.failures = []  # repeated at the end, where a truncated log still shows them
        self.lock = threading.Lock()

    def check(self, name, ok, detail=""):
        with self.lock:
            if ok:
                self.passed += 1
                print("PASS %s" % name)
            else:
                self.failed += 1
                line = "FAIL %s%s" % (name, (": %s" % detail) if detail else "")
                self.failures.append(line[:2000])
                print(line)
            sys.stdout.flush()
        return ok


R = Report()


def short(data, limit=300):
    text = data.decode("utf-8", "replace") if isinstance(data, bytes) else str(data)
    return text if len(text) <= limit else text[:limit] + "..."


# --------------------------------------------------------------------------------------------
# The OpenAPI document as a response validator

class Api:
    def __init__(self, root):
        self.path = os.path.join(root, "api-schema", "openapi.json")
        with open(self.path, "rb") as f:
            self.raw = f.read()
        self.doc = json.loads(self.raw)
        self.store = {}
        for path in sorted(glob.glob(os.path.join(root, "api-schema", "*.schema.json"))):
            with open(path) as f:
                schema = json.load(f)
            self.store[schema["$id"]] = schema
        self.store[OPENAPI_BASE] = self.doc
        self.local = threading.local()  # validators per thread: a RefResolver is not shareable

    def resolver(self):
        return RefResolver(OPENAPI_BASE, self.doc, store=dict(self.store))

    def deref(self, obj):
        """Follows a local $ref of an OpenAPI object (responses, headers)."""
        while isinstance(obj, dict) and "$ref" in obj:
            node = self.doc
            for token in obj["$ref"][2:].split("/"):
                node = node[token.replace("~1", "/").replace("~0", "~")]
            obj = node
        return obj

    def schema_errors(self, schema, instance):
        cache = self.local.__dict__.setdefault("validators", {})
        key = json.dumps(schema, sort_keys=True)
        validator = cache.get(key)
        if validator is None:
            validator = cache[key] = Draft202012Validator(schema, resolver=self.resolver())
        return ["%s at %s" % (e.message[:200], "/".join(str(p) for p in e.absolute_path))
                for e in validator.iter_errors(instance)]

    def component(self, name):
        return {"$ref": "#/components/schemas/" + name}

    def operation(self, method, template):
        return self.doc["paths"].get(template, {}).get(method.lower())

    def check_response(self, method, template, resp):
        """Problems of `resp` against the operation's declared response; [] if it conforms."""
        if template is None:  # No operation: only a no-such-route problem is possible.
            return self.check_problem_only(resp, "NotFoundProblem")
        op = self.operation(method, template)
        if op is None:
            return ["no operation %s %s in openapi.json" % (method, template)]
        declared = op["responses"].get(str(resp.status))
        if declared is None:
            return ["status %d is not declared for %s %s" % (resp.status, method, template)]
        declared = self.deref(declared)
        problems = []
        for name, header in declared.get("headers", {}).items():
            header = self.deref(header)
            if header.get("required") and name.lower() not in resp.headers:
                problems.append("header %s missing" % name)
        content = declared.get("content")
        if not content:
            if resp.body:
                problems.append("body not expected: %s" % short(resp.body))
            return problems
        media = resp.headers.get("content-type", "").split(";")[0].strip()
        if media not in content:
            return problems + ["content type %r, declared %s" % (media, list(content))]
        if media == "text/plain":
            return problems
        try:
            body = json.loads(resp.body)
        except ValueError as e:
            return problems + ["body is not JSON: %s" % e]
        return problems + self.schema_errors(content[media]["schema"], body)

    def check_problem_only(self, resp, schema_name):
        media = resp.headers.get("content-type", "").split(";")[0].strip()
        if media != "application/problem+json":
            return ["content type %r" % media]
        try:
            body = json.loads(resp.body)
        except ValueError as e:
            return ["body is not JSON: %s" % e]
        return self.schema_errors(self.component(schema_name), body)


# --------------------------------------------------------------------------------------------
# Server processes and HTTP

class Resp:
    def __init__(self, status, headers, body):
        self.status = status
        self.headers = headers
        self.body = body

    def json(self):
        return json.loads(self.body)


class Server:
    def __init__(self, binary, workdir, name, args, env=None):
        self.binary = binary
        self.env = env  # variables set (or, when None, removed) on top of the test's
        self.workdir = workdir
        self.name = name
        self.args = args
        self.proc = None
        self.port = None
        self.counts = {}   # (method, route template, status) -> requests answered
        self.lock = threading.Lock()
        self.log = None

    def start(self):
        port_file = os.path.join(self.workdir, self.name + ".port")
        if os.path.exists(port_file):
            os.unlink(port_file)
        self.log = open(os.path.join(self.workdir, self.name + ".log"), "ab")
        self.proc = subprocess.Popen(
            [self.binary, "serve", "--listen", "127.0.0.1:0", "--port-file", port_file] +
            ([] if "--log-level" in self.args else ["--log-level", "warn"]) + self.args,
            stdout=self.log, stderr=subprocess.STDOUT, stdin=subprocess.DEVNULL,
            env=self.environment())
        deadline = time.monotonic() + START_TIMEOUT
        while time.monotonic() < deadline:
            if self.proc.poll() is not None:
                raise RuntimeError("%s exited with %s at start" % (self.name, self.proc.returncode))
            try:
                with open(port_file) as f:
                    text = f.read().strip()
                if text:
                    self.port = int(text)
                    self.counts = {}
                    return self
            except FileNotFoundError:
                pass
            time.sleep(0.02)
        raise RuntimeError("%s wrote no port file within %.0f s" % (self.name, START_TIMEOUT))

    def environment(self):
        env = dict(os.environ)
        for k, v in (self.env or {}).items():
            if v is None:
                env.pop(k, None)
            else:
                env[k] = v
        return env

    def alive(self):
        return self.proc is not None and self.proc.poll() is None

    def terminate(self, timeout=STOP_TIMEOUT):
        """SIGTERM by PID; returns (exit code or None on timeout, seconds taken)."""
        start = time.monotonic()
        os.kill(self.proc.pid, signal.SIGTERM)
        try:
            code = self.proc.wait(timeout=timeout)
        except subprocess.TimeoutExpired:
            code = None
        return code, time.monotonic() - start

    def kill9(self):
        os.kill(self.proc.pid, signal.SIGKILL)
        return self.proc.wait(timeout=STOP_TIMEOUT)

    def ensure_stopped(self):
        if self.proc is not None and self.proc.poll() is None:
            os.kill(self.proc.pid, signal.SIGTERM)
            try:
                self.proc.wait(timeout=STOP_TIMEOUT)
            except subprocess.TimeoutExpired:
                os.kill(self.proc.pid, signal.SIGKILL)
                self.proc.wait(timeout=STOP_TIMEOUT)
        if self.log is not None:
            self.log.close()
            self.log = None

    def request(self, method, path, body=None, headers=None):
        conn = http.client.HTTPConnection("127.0.0.1", self.port, timeout=HTTP_TIMEOUT)
        try:
            conn.request(method, path, body=body, headers=headers or {})
            r = conn.getresponse()
            data = r.read()
            return Resp(r.status, {k.lower(): v for k, v in r.getheaders()}, data)
        finally:
            conn.close()

    def count(self, method, template, status):
        with self.lock:
            key = (method, template, status)
            self.counts[key] = self.counts.get(key, 0) + 1


class Client:
    """Requests by operation (method + path template), each validated against openapi.json."""

    def __init__(self, api, server, token=None):
        self.api = api
        self.server = server
        self.token = token

    def call(self, method, template, params=None, query=None, body=None, raw=None,
             ctype="application/json", headers=None, expect=None, name=None):
        path = template.format(**{k: urllib.parse.quote(v, safe="") for k, v in
                                  (params or {}).items()}) if template else raw_path(params)
        if query:
            path += "?" + urllib.parse.urlencode(query)
        h = dict(headers or {})
        if self.token is not None:
            h["Authorization"] = "Bearer " + self.token
        data = None
        if body is not None:
            data = json.dumps(body).encode() if not isinstance(body, bytes) else body
        if raw is not None:
            data = raw
        if data is not None and ctype is not None:
            h["Content-Type"] = ctype
        resp = self.server.request(method, path, data, h)
        if template is not None:
            self.server.count(method, template, resp.status)
        resp.problems = self.api.check_response(method, template, resp)
        if expect is not None:
            label = name or "%s %s" % (method, template)
            R.check("%s -> %d, body matches openapi" % (label, expect),
                    resp.status == expect and not resp.problems,
                    "got %d %s %s" % (resp.status, resp.problems[:3], short(resp.body)))
        return resp


def raw_path(params):
    return params["path"]


def wait_job(client, job_id, statuses, timeout=JOB_TIMEOUT, validate=True):
    """Polls GET /v1/jobs/{id} until its status is in `statuses`; returns the last view."""
    deadline = time.monotonic() + timeout
    bad = []
    view = None
    while time.monotonic() < deadline:
        resp = client.call("GET", "/v1/jobs/{id}", {"id": job_id})
        if resp.status != 200 or resp.problems:
            bad.append((resp.status, resp.problems[:2]))
        else:
            view = resp.json()
            if view["status"] in statuses:
                break
        time.sleep(0.02)
    if validate:
        R.check("job %s polled: every view 200 and valid" % job_id, not bad, str(bad[:3]))
    return view


# --------------------------------------------------------------------------------------------
# Models and the independent reference

def load_example(root, name):
    with open(os.path.join(root, "api-schema", "examples", name)) as f:
        return json.load(f)


def random_model(seed, n=40):
    """A seeded random maximisation model with a terminal state, a one-action state,
    duplicate next states with different rewards and a row summing to 1 - 4e-7."""
    rng = random.Random(seed)
    names = ["cell-%02d" % i for i in range(n - 1)] + ["goal"]
    actions = ["left", "right", "wait"]
    states = []
    for i in range(n - 1):
        avail = ["wait"] if i == 3 else actions
        acts = []
        for a in avail:
            k = rng.randint(1, 4)
            weights = [rng.random() + 0.05 for _ in range(k)]
            total = sum(weights)
            probs = [round(w / total, 6) for w in weights]
            probs[-1] = round(1.0 - sum(probs[:-1]), 6)
            outs = [{"next": names[rng.randrange(n)], "probability": p,
                     "reward": round(rng.uniform(-1, 1), 3)} for p in probs]
            if a == "left" and i % 5 == 0:  # the same next state twice, different rewards
                outs[0]["probability"] = round(outs[0]["probability"] / 2, 6)
                outs.append(dict(outs[0], reward=round(outs[0]["reward"] + 1.5, 3)))
                outs[-1]["probability"] = round(1.0 - sum(o["probability"] for o in outs[:-1]), 6)
            acts.append({"action": a, "reward": round(rng.uniform(0, 2), 3), "outcomes": outs})
        states.append({"name": names[i], "actions": acts})
    # A row that sums to 1 - 4e-7: accepted (within 1e-6) and scaled.
    states[1]["actions"][0]["outcomes"] = [
        {"next": names[2], "probability": 0.4999998}, {"next": "goal", "probability": 0.5}]
    states.append({"name": "goal", "terminal": True})
    return {"format": "mdpserve/model@1", "name": "random-walk-%d" % seed,
            "objective": "maximize", "criterion": {"kind": "discounted", "discount": 0.9},
            "actions": actions, "states": states}


def slow_model(n, seed):
    """A ring whose value iteration contracts very slowly (discount 0.999999): solves of it
    run until their time limit, so they are bounded in time and long enough to overlap."""
    rng = random.Random(seed)
    states = []
    for i in range(n):
        acts = []
        for a, step in (("hold", 1), ("shift", 7)):
            acts.append({"action": a, "reward": round(rng.uniform(0, 1), 3), "outcomes": [
                {"next": "s%d" % ((i + step) % n), "probability": 0.5},
                {"next": "s%d" % ((i + 2 * step + 1) % n), "probability": 0.3},
                {"next": "s%d" % i, "probability": 0.2}]})
        states.append({"name": "s%d" % i, "actions": acts})
    return {"format": "mdpserve/model@1", "name": "slow-ring-%d-%d" % (n, seed),
            "objective": "maximize", "criterion": {"kind": "discounted", "discount": 0.999999},
            "actions": ["hold", "shift"], "states": states}


def slow_options(seconds):
    return {"method": "value_iteration", "tolerance": 1e-14, "max_iterations": 1000000000,
            "time_limit_seconds": seconds}


class Reference:
    """Value iteration in plain Python over a model document, to 1e-11."""

    def __init__(self, doc):
        self.g = doc["criterion"]["discount"]
        self.maximize = doc["objective"] == "maximize"
        self.names = [s["name"] for s in doc["states"]]
        index = {n: i for i, n in enumerate(self.names)}
        self.rows = []  # per state: [(action, expected reward, [(next index, p)])]
        for s in doc["states"]:
            acts = []
            for a in s.get("actions") or []:
                total = sum(o["probability"] for o in a["outcomes"])
                r = a.get("reward", 0.0) + sum(o["probability"] / total * o.get("reward", 0.0)
                                               for o in a["outcomes"])
                acts.append((a["action"], r, [(index[o["next"]], o["probability"] / total)
                                              for o in a["outcomes"]]))
            self.rows.append(acts)
        best = max if self.maximize else min
        v = [0.0] * len(self.names)
        for _ in range(100000):
            nv = [best(r + self.g * sum(p * v[j] for j, p in outs) for _, r, outs in acts)
                  if acts else 0.0 for acts in self.rows]
            change = max(abs(a - b) for a, b in zip(nv, v))
            v = nv
            if change * self.g / (1 - self.g) < 1e-11:
                break
        self.v = v
        self.q = [{a: r + self.g * sum(p * v[j] for j, p in outs) for a, r, outs in acts}
                  for acts in self.rows]

    def state(self, name):
        i = self.names.index(name)
        q = self.q[i]
        if not q:
            return {"value": 0.0, "q": {}, "optimal": set(), "gap": None}
        best = (max if self.maximize else min)(q.values())
        optimal = {a for a, x in q.items() if abs(x - best) <= 1e-8}
        ordered = sorted(q.values(), reverse=self.maximize)
        gap = abs(ordered[0] - ordered[1]) if len(ordered) >= 2 else None
        return {"value": self.v[i], "q": q, "optimal": optimal, "gap": gap}


def close(a, b, tol=VALUE_TOLERANCE):
    return a is not None and b is not None and abs(a - b) <= tol


# --------------------------------------------------------------------------------------------
# (0) The OpenAPI document itself

def check_openapi_document(api, root):
    doc = api.doc
    R.check("openapi: version 3.1.0 with the 2020-12 dialect",
            doc.get("openapi") == "3.1.0" and
            doc.get("jsonSchemaDialect") == "https://json-schema.org/draft/2020-12/schema")
    R.check("openapi: no )mdpopenapi\" sequence (embedding delimiter)",
            b')mdpopenapi"' not in api.raw)
    with open(os.path.join(root, "server", "routes.cc")) as f:
        routes = set(re.findall(r'\{"(GET|POST|DELETE)", "(/[^"]*)"', f.read()))
    documented = {(m.upper(), p) for p, item in doc["paths"].items() for m in item
                  if m in ("get", "post", "delete", "put", "patch")}
    R.check("openapi: exactly the %d routes of routes.cc" % len(routes),
            routes and routes == documented,
            "missing %s, extra %s" % (sorted(routes - documented), sorted(documented - routes)))
    bad = []
    for path, item in doc["paths"].items():
        for method, op in item.items():
            if method == "parameters":
                continue
            for key in ("operationId", "summary", "description", "tags"):
                if not op.get(key):
                    bad.append("%s %s lacks %s" % (method, path, key))
            public = path in ("/healthz", "/readyz")
            if public != (op.get("security") == []):
                bad.append("%s %s security" % (method, path))
            if not public and "401" not in op["responses"]:
                bad.append("%s %s lacks 401" % (method, path))
            for status, resp in op["responses"].items():
                if not api.deref(resp).get("description"):
                    bad.append("%s %s %s lacks a description" % (method, path, status))
            for p in op.get("parameters", []) + item.get("parameters", []):
                if not api.deref(p).get("description"):
                    bad.append("%s %s parameter lacks a description" % (method, path))
    R.check("openapi: operations have ids, summaries, descriptions, 401 unless public",
            not bad, "; ".join(bad[:5]))
    undocumented = []

    def walk(schema, where):
        if not isinstance(schema, dict):
            return
        for name, prop in schema.get("properties", {}).items():
            if isinstance(prop, dict) and "description" not in prop and "$ref" not in prop:
                undocumented.append(where + "/" + name)
            walk(prop, where + "/" + name)
        for key in ("allOf", "oneOf", "anyOf"):
            for i, sub in enumerate(schema.get(key, [])):
                walk(sub, "%s/%s/%d" % (where, key, i))
        walk(schema.get("items"), where + "/items")

    for name, schema in doc["components"]["schemas"].items():
        if "description" not in schema:
            undocumented.append(name)
        walk(schema, name)
    R.check("openapi: every component schema and property has a description",
            not undocumented, ", ".join(undocumented[:8]))
    invalid = []
    for name, schema in doc["components"]["schemas"].items():
        try:
            Draft202012Validator.check_schema(schema)
        except Exception as e:  # noqa: BLE001 - report any schema error
            invalid.append("%s: %s" % (name, str(e)[:100]))
    R.check("openapi: component schemas are valid 2020-12 schemas", not invalid, str(invalid[:3]))
    # The validator is not vacuous: wrong bodies are rejected (references resolve).
    wrong = [("BestAction", {"state": "s", "terminal": False, "action": "a",
                             "optimal_actions": ["a"], "value": 1.0, "action_gap": None,
                             "tied": False, "value_error_bound": 0.0, "solution_id": "0" * 32}),
             ("BestAction", {"state": "", "terminal": False, "action": "a", "q": {"a": 1.0},
                             "optimal_actions": ["a"], "value": 1.0, "action_gap": None,
                             "tied": False, "value_error_bound": 0.0, "solution_id": "0" * 32}),
             ("Problem", {"type": PROBLEM + "conflict", "title": "Conflict", "status": "409",
                          "detail": "x"}),
             ("UnknownStatesProblem", {"type": PROBLEM + "unknown-states", "title": "t",
                                       "status": 422, "detail": "x"}),
             ("SolutionTables", {"format": "mdpserve/solution@1", "id": "0" * 32}),
             ("VerificationReport", {"format": "mdpserve/verification@1", "kind": "values",
                                     "verdict": "maybe", "tolerance": 0, "worst_states": []})]
    accepted = [name for name, body in wrong if not api.schema_errors(api.component(name), body)]
    R.check("openapi: %d wrong bodies are rejected by their schemas" % len(wrong), not accepted,
            "accepted: %s" % accepted)
    scheme = doc["components"]["securitySchemes"].get("bearerAuth", {})
    R.check("openapi: global HTTP bearer security",
            scheme.get("type") == "http" and scheme.get("scheme") == "bearer" and
            doc.get("security") == [{"bearerAuth": []}])
    # The solve option bounds agree with solver/options.h.
    with open(os.path.join(root, "solver", "options.h")) as f:
        header = f.read()
    bounds = re.findall(r'\{"(\w+)",\s*"[^"]*",\s*([-\w.+]+),\s*([-\w.+]+),\s*([-\w.+]+)\}',
                        header.replace("\n", " "))
    options = doc["components"]["schemas"]["SolveOptions"]["properties"]
    mismatched = [b[0] for b in bounds
                  if float(options[b[0]]["minimum"]) != float(b[2]) or
                  float(options[b[0]]["maximum"]) != float(b[3]) or
                  float(options[b[0]]["default"]) != float(b[1])]
    R.check("openapi: SolveOptions bounds match kSolveOptionBounds (%d options)" % len(bounds),
            len(bounds) == 6 and not mismatched, "mismatched %s" % mismatched)


# --------------------------------------------------------------------------------------------
# (a) The workflow

def upload(client, doc, expect, name):
    resp = client.call("POST", "/v1/models", body=doc, expect=expect, name=name)
    if resp.status in (200, 201):
        body = resp.json()
        R.check(name + ": Location is the model's path",
                resp.headers.get("location") == "/v1/models/" + body["id"],
                resp.headers.get("location"))
        R.check(name + ": created is %s" % (expect == 201), body["created"] == (expect == 201))
        return body["id"]
    return None


def solve(client, model_id, options=None, name="solve"):
    """Starts a solve and waits for it; returns (job view, solution id)."""
    body = {"model_id": model_id}
    if options is not None:
        body["options"] = options
    resp = client.call("POST", "/v1/jobs", body=body, expect=202, name=name + ": start job")
    if resp.status != 202:
        return None, None
    job = resp.json()
    R.check(name + ": Location is the job's path",
            resp.headers.get("location") == "/v1/jobs/" + job["id"], resp.headers.get("location"))
    view = wait_job(client, job["id"], ("succeeded", "failed", "cancelled"))
    R.check(name + ": job succeeded", view is not None and view["status"] == "succeeded",
            str(view))
    return view, (view or {}).get("solution_id")


def reshuffled(doc):
    """The same document with every object's keys in reverse order."""
    if isinstance(doc, dict):
        return {k: reshuffled(doc[k]) for k in reversed(list(doc))}
    if isinstance(doc, list):
        return [reshuffled(x) for x in doc]
    return doc


def check_best_actions(client, model_id, doc, ref, label):
    """Every state's best-action answer against the reference; returns {state: body bytes}."""
    answers = {}
    bad_status, bad_value = [], []
    for name in ref.names:
        resp = client.call("GET", "/v1/models/{id}/policy", {"id": model_id}, {"state": name})
        if resp.status != 200 or resp.problems:
            bad_status.append((name, resp.status, resp.problems[:1]))
            continue
        answers[name] = resp.body
        got = resp.json()
        want = ref.state(name)
        problems = []
        if set(got["optimal_actions"]) != want["optimal"]:
            problems.append("optimal %s vs %s" % (got["optimal_actions"], sorted(want["optimal"])))
        if not close(got["value"], want["value"]):
            problems.append("value %r vs %r" % (got["value"], want["value"]))
        if set(got["q"]) != set(want["q"]) or \
                any(not close(got["q"][a], want["q"][a]) for a in want["q"]):
            problems.append("q %s vs %s" % (got["q"], want["q"]))
        if (want["gap"] is None) != (got["action_gap"] is None) or \
                (want["gap"] is not None and not close(got["action_gap"], want["gap"])):
            problems.append("gap %r vs %r" % (got["action_gap"], want["gap"]))
        if want["optimal"] and got["action"] not in want["optimal"]:
            problems.append("action %r not optimal" % got["action"])
        if not want["optimal"] and got["action"] is not None:
            problems.append("terminal state has action %r" % got["action"])
        if got["tied"] != (len(want["optimal"]) >= 2):
            problems.append("tied %r" % got["tied"])
        if problems:
            bad_value.append((name, problems))
    R.check("%s: best action answered 200 for all %d states" % (label, len(ref.names)),
            not bad_status, str(bad_status[:3]))
    ties = sum(1 for n in ref.names if len(ref.state(n)["optimal"]) >= 2)
    R.check("%s: optimal sets, values, Q and gaps equal value iteration to 1e-6 "
            "(%d states, %d tied)" % (label, len(ref.names), ties),
            not bad_value, str(bad_value[:3]))
    return answers


def check_explain(client, model_id, ref, states, tables, label):
    bad = []
    values = tables["values"]
    for name in states:
        resp = client.call("GET", "/v1/models/{id}/policy/explain", {"id": model_id},
                           {"state": name})
        if resp.status != 200 or resp.problems:
            bad.append((name, resp.status, resp.problems[:2]))
            continue
        got = resp.json()
        i = ref.names.index(name)
        if [a["action"] for a in got["actions"]] != [a for a, _, _ in ref.rows[i]]:
            bad.append((name, "actions in document order"))
        for entry, (action, reward, outs) in zip(got["actions"], ref.rows[i]):
            q = entry["q"]
            if abs(q - (entry["expected_reward"] + entry["discounted_next_value"])) > \
                    1e-9 * max(1.0, abs(q)):
                bad.append((name, action, "q != expected_reward + discounted_next_value"))
            if not close(entry["expected_reward"], reward, 1e-9):
                bad.append((name, action, "expected_reward", entry["expected_reward"], reward))
            if not close(entry["discounted_next_value"],
                         ref.g * sum(p * ref.v[j] for j, p in outs)):
                bad.append((name, action, "discounted_next_value"))
            merged = {}
            for j, p in outs:
                merged[ref.names[j]] = merged.get(ref.names[j], 0.0) + p
            if entry["next_states"] != len(merged):
                bad.append((name, action, "next_states", entry["next_states"], len(merged)))
            probs = [o["probability"] for o in entry["outcomes"]]
            if probs != sorted(probs, reverse=True):
                bad.append((name, action, "outcomes not most likely first"))
            for o in entry["outcomes"]:
                if not close(o["probability"], merged.get(o["next"], -1), 1e-9) or \
                        o["value"] != values[o["next"]]:
                    bad.append((name, action, "outcome", o))
        if got["value"] != values[name] or got["discount"] != ref.g:
            bad.append((name, "value or discount"))
    R.check("%s: explain for %d states: q = expected_reward + discounted_next_value, both "
            "equal to the reference" % (label, len(states)), not bad, str(bad[:3]))


def scenario_a(api, client, root, m):
    """Upload, query, solve, verify. Fills `m` with what later scenarios compare."""
    pump = load_example(root, "pump-maintenance.json")
    robot = load_example(root, "warehouse-robot.json")
    rand = random_model(20240917)
    pump_id = upload(client, pump, 201, "a: upload pump model")
    robot_id = upload(client, robot, 201, "a: upload robot model")
    rand_id = upload(client, rand, 201, "a: upload random model")
    again = upload(client, pump, 200, "a: upload pump model again")
    R.check("a: re-upload gives the same id", again == pump_id, "%s vs %s" % (again, pump_id))
    spaced = json.dumps(reshuffled(pump), indent=7, sort_keys=False).encode()
    resp = client.call("POST", "/v1/models", raw=spaced, expect=200,
                       name="a: upload with other whitespace and key order")
    R.check("a: other whitespace and key order give the same id",
            resp.status == 200 and resp.json()["id"] == pump_id, short(resp.body))
    m.update(pump_id=pump_id, robot_id=robot_id, rand_id=rand_id)

    resp = client.call("GET", "/v1/models", expect=200, name="a: list models")
    ids = [x["id"] for x in resp.json()["models"]] if resp.status == 200 else []
    R.check("a: list has the three models in upload order", ids == [pump_id, robot_id, rand_id],
            str(ids))
    resp = client.call("GET", "/v1/models/{id}", {"id": pump_id}, expect=200, name="a: get model")
    rec = resp.json()
    R.check("a: model record counts", rec["states"] == 10 and rec["actions"] == 3 and
            rec["name"] == pump["name"] and rec["state_actions"] == 22, str(rec))
    resp = client.call("GET", "/v1/models/{id}/document", {"id": pump_id}, expect=200,
                       name="a: get model document")
    canonical = resp.json()
    R.check("a: document keeps names, objective and discount",
            [s["name"] for s in canonical["states"]] == [s["name"] for s in pump["states"]] and
            canonical["objective"] == "minimize" and canonical["criterion"]["discount"] == 0.97)
    resp = client.call("POST", "/v1/models", raw=resp.body, expect=200,
                       name="a: upload the canonical document")
    R.check("a: canonical document has the same id",
            resp.status == 200 and resp.json()["id"] == pump_id)

    refs = {pump_id: Reference(pump), robot_id: Reference(robot), rand_id: Reference(rand)}
    docs = {pump_id: pump, robot_id: robot, rand_id: rand}
    labels = {pump_id: "a: pump", robot_id: "a: robot", rand_id: "a: random"}
    solutions = {}
    for mid in (pump_id, robot_id, rand_id):
        view, sid = solve(client, mid, None, labels[mid])
        solutions[mid] = sid
        if view:
            m.setdefault("jobs", []).append(view["id"])
    m["solutions"] = solutions
    m["answers"] = {}
    for mid in (pump_id, robot_id, rand_id):
        m["answers"][mid] = check_best_actions(client, mid, docs[mid], refs[mid], labels[mid])

    # Batch: the same answers, in request order, duplicates included.
    states = ["worn_peak", "failed_off", "new_peak", "worn_peak", "degraded_off"]
    resp = client.call("POST", "/v1/models/{id}/policy/batch", {"id": pump_id},
                       body={"states": states}, expect=200, name="a: batch of 5 states")
    if resp.status == 200:
        got = resp.json()
        single = [json.loads(m["answers"][pump_id][s]) for s in states]
        R.check("a: batch answers equal the single answers, in order",
                got["answers"] == single and got["solution_id"] == solutions[pump_id])
    m["batch_body"] = resp.body

    # Solution list, report, tables.
    for mid in (pump_id, robot_id, rand_id):
        sid = solutions[mid]
        resp = client.call("GET", "/v1/models/{id}/solutions", {"id": mid}, expect=200,
                           name=labels[mid] + ": list solutions")
        R.check(labels[mid] + ": one solution listed",
                [s["id"] for s in resp.json()["solutions"]] == [sid])
        resp = client.call("GET", "/v1/models/{id}/solutions/{sid}", {"id": mid, "sid": sid},
                           expect=200, name=labels[mid] + ": solution report")
        report = resp.json()
        R.check(labels[mid] + ": report converged, policy_iteration, bound <= 1e-8",
                report["outcome"] == "converged" and report["method"] == "policy_iteration" and
                report["value_error_bound"] <= 1e-8 and report["model_id"] == mid)
    tables = {}
    for mid in (pump_id, robot_id, rand_id):
        resp = client.call("GET", "/v1/models/{id}/solutions/{sid}/tables",
                           {"id": mid, "sid": solutions[mid]}, expect=200,
                           name=labels[mid] + ": solution tables")
        tables[mid] = resp.json()
        ref = refs[mid]
        worst = max(abs(tables[mid]["values"][n] - ref.v[i]) for i, n in enumerate(ref.names))
        R.check(labels[mid] + ": table values equal value iteration to 1e-6 (max diff %.2e)"
                % worst, worst <= VALUE_TOLERANCE)
        per_state = {s["state"]: s for s in tables[mid]["states"]}
        same = all(json.loads(m["answers"][mid][n])["q"] == per_state[n]["q"] and
                   json.loads(m["answers"][mid][n])["optimal_actions"] ==
                   per_state[n]["optimal_actions"] for n in ref.names)
        R.check(labels[mid] + ": tables agree with the best-action answers", same)
    m["tables"] = tables

    check_explain(client, pump_id, refs[pump_id],
                  ["worn_peak", "failed_peak", "new_off", "degraded_peak"], tables[pump_id],
                  "a: pump")
    check_explain(client, rand_id, refs[rand_id], ["cell-00", "cell-01", "cell-03", "cell-05",
                                                   "goal"], tables[rand_id], "a: random")

    # Verify: the solution's own values and policy pass; a perturbed policy fails.
    for mid in (pump_id, rand_id):
        t = tables[mid]
        resp = client.call("POST", "/v1/models/{id}/verify", {"id": mid},
                           body={"format": "mdpserve/values@1", "values": t["values"]},
                           expect=200, name=labels[mid] + ": verify own values")
        R.check(labels[mid] + ": own values pass", resp.status == 200 and
                resp.json()["verdict"] == "pass" and resp.json()["kind"] == "values")
        resp = client.call("POST", "/v1/models/{id}/verify", {"id": mid},
                           body={"format": "mdpserve/policy@1", "policy": t["policy"]},
                           expect=200, name=labels[mid] + ": verify own policy")
        R.check(labels[mid] + ": own policy passes", resp.status == 200 and
                resp.json()["verdict"] == "pass" and resp.json()["suboptimal_count"] == 0)
        # The worst alternative action (largest reference loss) in the state where it is worst.
        ref = refs[mid]
        choice = None
        for i, name in enumerate(ref.names):
            st = ref.state(name)
            for a, q in st["q"].items():
                loss = abs(q - st["value"])
                if a not in st["optimal"] and (choice is None or loss > choice[2]):
                    choice = (name, a, loss)
        policy = dict(t["policy"])
        policy[choice[0]] = choice[1]
        resp = client.call("POST", "/v1/models/{id}/verify", {"id": mid},
                           body={"format": "mdpserve/policy@1", "policy": policy, "worst": 3},
                           expect=200, name=labels[mid] + ": verify a perturbed policy")
        rep = resp.json() if resp.status == 200 else {}
        listed = [s["state"] for s in rep.get("suboptimal_states", [])]
        R.check(labels[mid] + ": perturbed policy fails and lists state %s" % choice[0],
                rep.get("verdict") == "fail" and listed == [choice[0]] and
                rep["suboptimal_states"][0]["chosen"] == [choice[1]] and
                rep["max_loss"] > 1e-6 and len(rep["worst_states"]) <= 3, short(resp.body))
        m.setdefault("verify_bodies", {})[mid] = resp.body

    # The same solve again: 200 cached, Location the solution.
    resp = client.call("POST", "/v1/jobs", body={"model_id": pump_id}, expect=200,
                       name="a: the same solve again")
    body = resp.json() if resp.status == 200 else {}
    want = "/v1/models/%s/solutions/%s" % (pump_id, solutions[pump_id])
    R.check("a: cached answer names the solution", body.get("cached") is True and
            body.get("solution_id") == solutions[pump_id] and body.get("solution") == want and
            resp.headers.get("location") == want, short(resp.body))
    # Equivalent options (defaults written out, another thread count) are the same solve.
    resp = client.call("POST", "/v1/jobs", body={"model_id": pump_id, "options": {
        "method": "auto", "tolerance": 1e-8, "threads": 2}}, expect=200,
        name="a: the same solve with explicit defaults")
    R.check("a: explicit defaults are the same solution",
            resp.status == 200 and resp.json()["solution_id"] == solutions[pump_id])
    # Another method is another solution; queries then use the newest.
    view, sid = solve(client, pump_id, {"method": "value_iteration", "tolerance": 1e-10},
                      "a: pump value iteration")
    R.check("a: another method gives another solution", sid and sid != solutions[pump_id])
    resp = client.call("GET", "/v1/models/{id}/solutions", {"id": pump_id}, expect=200,
                       name="a: list two solutions")
    R.check("a: newest solution listed first",
            [s["id"] for s in resp.json()["solutions"]] == [sid, solutions[pump_id]])
    resp = client.call("GET", "/v1/models/{id}/policy", {"id": pump_id},
                       {"state": "worn_peak", "solution_id": solutions[pump_id]}, expect=200,
                       name="a: query an older solution by id")
    R.check("a: the older solution answers as before",
            resp.body == m["answers"][pump_id]["worn_peak"])
    resp = client.call("GET", "/v1/models/{id}/policy", {"id": pump_id}, {"state": "worn_peak"},
                       expect=200, name="a: query the current solution")
    got = resp.json()
    R.check("a: the current solution is the newest and agrees to 1e-6",
            got["solution_id"] == sid and close(got["value"], refs[pump_id].state("worn_peak")
                                                 ["value"]))
    m["solutions_vi"] = sid
    resp = client.call("GET", "/v1/jobs", query={"model_id": pump_id, "status": "succeeded"},
                       expect=200, name="a: list the pump's succeeded jobs")
    R.check("a: two succeeded pump jobs, newest first",
            [j["id"] for j in resp.json()["jobs"]] == [view["id"], m["jobs"][0]])
    m["jobs"].append(view["id"])
    m["solves"] = 4
    # Comparing the two pump solutions (policy iteration vs value iteration, both tight):
    # same model, so no state is added or removed and no value moves beyond the margin.
    resp = client.call("GET", "/v1/models/{id}/compare", {"id": pump_id},
                       {"with": pump_id, "solution_id": solutions[pump_id],
                        "with_solution_id": sid}, expect=200,
                       name="a: compare two solutions of one model")
    got = resp.json() if resp.status == 200 else {}
    R.check("a: comparison of two solves of one model finds no change",
            got.get("common_states") == 10 and got.get("value_changed_count") == 0 and
            got.get("only_in_a_count") == 0 and got.get("optimal_set_changed_count") == 0 and
            got.get("max_abs_value_difference", 1) <= got.get("value_margin", 0), short(resp.body))
    client.call("GET", "/v1/models/{id}/compare", {"id": pump_id}, expect=400,
                name="a: compare without 'with'")
    client.call("GET", "/v1/models/{id}/compare", {"id": pump_id}, {"with": "nosuchmodel"},
                expect=404, name="a: compare with an unknown model")
    # A Monte Carlo simulation job of the current (value iteration) solution's policy from
    # worn_peak: its mean must cover the exact value within its 99.9% interval.
    resp = client.call("POST", "/v1/models/{id}/simulations", {"id": pump_id},
                       body={"start": {"worn_peak": 1.0}, "episodes": 4000, "max_steps": 2000,
                             "seed": 7, "confidence": 0.999}, expect=202,
                       name="a: start a simulation")
    if resp.status == 202:
        job = wait_job(client, resp.json()["id"], ("succeeded", "failed", "cancelled"))
        result = (job or {}).get("result") or {}
        exact = refs[pump_id].state("worn_peak")["value"]
        R.check("a: simulation succeeded and its interval covers the exact value",
                job is not None and job["status"] == "succeeded" and
                result.get("format") == "mdpserve/simulation@1" and
                result["return"]["confidence_interval"]["low"] <= exact <=
                result["return"]["confidence_interval"]["high"],
                "%s exact %s" % (short(json.dumps(result)), exact))
    client.call("POST", "/v1/models/{id}/simulations", {"id": pump_id},
                body={"start": {"attic": 1.0}}, expect=422,
                name="a: simulate from an unknown state")
    client.call("POST", "/v1/models/{id}/simulations", {"id": pump_id},
                body={"episodes": 0}, expect=422, name="a: simulate zero episodes")
    client.call("POST", "/v1/models/{id}/simulations", {"id": pump_id}, raw=b'{"episodes": ',
                ctype="application/json", expect=400, name="a: simulate with a body cut short")


# --------------------------------------------------------------------------------------------
# (b) and (c) Restarts

def snapshot(client, m):
    """Raw bodies of a fixed set of queries, for byte-for-byte comparison across restarts."""
    out = {}
    pump, rand = m["pump_id"], m["rand_id"]
    queries = [("GET", "/v1/models", {}, None, None),
               ("GET", "/v1/models/{id}", {"id": pump}, None, None),
               ("GET", "/v1/models/{id}/document", {"id": rand}, None, None),
               ("GET", "/v1/models/{id}/solutions", {"id": pump}, None, None),
               ("GET", "/v1/models/{id}/solutions/{sid}",
                {"id": rand, "sid": m["solutions"][rand]}, None, None),
               ("GET", "/v1/models/{id}/solutions/{sid}/tables",
                {"id": pump, "sid": m["solutions"][pump]}, None, None),
               ("GET", "/v1/models/{id}/solutions/{sid}/tables",
                {"id": rand, "sid": m["solutions"][rand]}, None, None),
               ("POST", "/v1/models/{id}/policy/batch", {"id": rand},
                None, {"states": ["cell-00", "cell-07", "goal", "cell-03"]}),
               ("GET", "/v1/jobs/{id}", {"id": m["jobs"][0]}, None, None)]
    for state in ("worn_peak", "failed_off", "new_peak"):
        queries.append(("GET", "/v1/models/{id}/policy", {"id": pump}, {"state": state}, None))
        queries.append(("GET", "/v1/models/{id}/policy/explain", {"id": pump},
                        {"state": state}, None))
    for state in ("cell-01", "cell-03", "goal"):
        queries.append(("GET", "/v1/models/{id}/policy", {"id": rand},
                        {"state": state, "solution_id": m["solutions"][rand]}, None))
    for method, template, params, query, body in queries:
        resp = client.call(method, template, params, query, body)
        key = "%s %s %s %s" % (method, template.format(**params), query or "", body or "")
        out[key] = (resp.status, resp.body)
    return out


def compare_snapshots(before, after, label):
    differ = [k for k in before if before[k] != after.get(k)]
    R.check("%s: %d answers byte-identical (all 200)" % (label, len(before)),
            not differ and all(s == 200 for s, _ in before.values()), str(differ[:3]))


def scenario_b(api, server, m):
    """The main server runs with --shutdown-deadline 0.2: a solve still running at SIGTERM is
    stopped and queued again, and runs to its end after the restart."""
    client = Client(api, server)
    before = snapshot(client, m)
    resp = client.call("POST", "/v1/jobs", body={"model_id": m["slow_id"],
                                                 "options": slow_options(1.5)},
                       expect=202, name="b: start a solve that outlives the shutdown deadline")
    job_id = resp.json()["id"]
    view = wait_job(client, job_id, ("running",), timeout=20)
    R.check("b: it is running at SIGTERM", view is not None and view["status"] == "running")
    code, seconds = server.terminate()
    R.check("b: SIGTERM: exit code 0 within %.0f s (took %.2f s)" % (STOP_TIMEOUT, seconds),
            code == 0, "exit code %s" % code)
    server.start()
    client = Client(api, server)
    # Warm start: before any query, the solved models and their solutions are loaded into the
    # cache by a background thread (each solved model counts 2 entries).
    solved = len(m["solutions"])
    deadline = time.monotonic() + 20
    entries = warming = -1
    while time.monotonic() < deadline:
        resp = client.call("GET", "/metrics")
        if resp.status != 200:
            break
        samples = metric_samples(resp.body.decode())
        entries = samples.get(("mdpserve_cache_entries", ()), -1)
        warming = samples.get(("mdpserve_cache_warming", ()), -1)
        if warming == 0:
            break
        time.sleep(0.05)
    R.check("b: warm start: the %d solved models and their solutions are cached before any "
            "query (%d entries once mdpserve_cache_warming is %s)" % (solved, entries, warming),
            warming == 0 and entries >= 2 * solved)
    # The solve stopped by SIGTERM runs again now and looks up its model; the miss counter is
    # read once it has ended, so that only the queries below can move it.
    view = wait_job(client, job_id, ("succeeded", "failed", "cancelled"), timeout=JOB_TIMEOUT)
    miss = ("mdpserve_cache_requests_total", (("result", "miss"),))
    samples = metric_samples(client.call("GET", "/metrics", expect=200,
                                         name="b: metrics after the re-run solve").body.decode())
    misses = samples.get(miss, -1)
    for state in ("worn_peak", "new_peak"):
        client.call("GET", "/v1/models/{id}/policy", {"id": m["pump_id"]}, {"state": state},
                    expect=200, name="b: first queries after the restart")
    samples = metric_samples(client.call("GET", "/metrics", expect=200,
                                         name="b: metrics after the first queries").body.decode())
    R.check("b: the first queries after the restart found the model and its solution cached "
            "(cache misses %s before them, %s after)" % (misses, samples.get(miss)),
            misses >= 0 and samples.get(miss) == misses)
    client.call("GET", "/readyz", expect=200, name="b: restarted server is ready")
    after = snapshot(client, m)
    compare_snapshots(before, after, "b: after restart")
    view = wait_job(client, job_id, ("succeeded", "failed", "cancelled"), timeout=JOB_TIMEOUT)
    R.check("b: the stopped solve ran again after the restart and succeeded",
            view is not None and view["status"] == "succeeded" and view["solution_id"], str(view))
    resp = client.call("GET", "/v1/models/{id}/solutions/{sid}",
                       {"id": m["slow_id"], "sid": (view or {}).get("solution_id") or "none"},
                       expect=200, name="b: report of the re-run solve")
    R.check("b: the re-run solve ended at its time limit",
            resp.status == 200 and resp.json()["outcome"] == "time_limit")
    resp = client.call("POST", "/v1/jobs", body={"model_id": m["pump_id"]}, expect=200,
                       name="b: solve again after restart")
    R.check("b: still cached after restart",
            resp.status == 200 and resp.json()["solution_id"] == m["solutions"][m["pump_id"]])
    return after


def scenario_c(api, server, m, before):
    client = Client(api, server)
    big_id = upload(client, slow_model(50000, 11), 201, "c: upload a 50,000-state slow model")
    before = dict(before)
    resp = client.call("POST", "/v1/jobs", body={"model_id": big_id,
                                                 "options": slow_options(60)},
                       expect=202, name="c: start a long solve")
    job_id = resp.json()["id"] if resp.status == 202 else None
    view = wait_job(client, job_id, ("running",), timeout=20)
    deadline = time.monotonic() + 20
    while view and (view.get("progress") or {}).get("iteration", 0) < 10 and \
            time.monotonic() < deadline:
        view = client.call("GET", "/v1/jobs/{id}", {"id": job_id}).json()
        time.sleep(0.05)
    R.check("c: the solve is running with progress before the kill",
            view is not None and view["status"] == "running" and
            view["progress"]["iteration"] >= 10, str(view))
    code = server.kill9()
    R.check("c: SIGKILL ended the server", code == -signal.SIGKILL, "exit %s" % code)
    server.start()
    client = Client(api, server)
    resp = client.call("GET", "/v1/jobs/{id}", {"id": job_id}, expect=200,
                       name="c: get the killed job after restart")
    view = resp.json() if resp.status == 200 else {}
    R.check("c: killed job is failed, with a reason naming the stop",
            view.get("status") == "failed" and "stopped" in (view.get("error") or "") and
            view.get("finished_at") is not None and view.get("solution_id") is None, str(view))
    resp = client.call("GET", "/v1/jobs", query={"status": "failed"}, expect=200,
                       name="c: list failed jobs")
    R.check("c: the failed job is listed", [j["id"] for j in resp.json()["jobs"]] == [job_id])
    resp = client.call("GET", "/v1/models", expect=200, name="c: list models after restart")
    ids = [x["id"] for x in resp.json()["models"]]
    R.check("c: every model is still listed",
            ids == [m["pump_id"], m["robot_id"], m["rand_id"], m["slow_id"], big_id], str(ids))
    after = snapshot(client, m)
    del before["GET /v1/models  "], after["GET /v1/models  "]
    compare_snapshots(before, after, "c: after kill -9 and restart")
    # The store takes writes: a short solve of the same model.
    view, sid = solve(client, m["slow_id"], {"method": "value_iteration", "max_iterations": 30},
                      "c: short solve after restart")
    resp = client.call("GET", "/v1/models/{id}/solutions/{sid}", {"id": m["slow_id"], "sid": sid},
                       expect=200, name="c: report of the short solve")
    R.check("c: short solve stopped at its iteration limit",
            resp.status == 200 and resp.json()["outcome"] == "iteration_limit")


# --------------------------------------------------------------------------------------------
# (d) Concurrent queries during a solve

def scenario_d(api, server, m):
    client = Client(api, server)
    slow = slow_model(3000, 7)
    m["slow_id"] = upload(client, slow, 201, "d: upload slow model (3000 states)")
    resp = client.call("POST", "/v1/jobs", body={"model_id": m["slow_id"],
                                                 "options": slow_options(30)},
                       expect=202, name="d: start a slow solve")
    job_id = resp.json()["id"]
    view = wait_job(client, job_id, ("running",), timeout=20)
    deadline = time.monotonic() + 20
    while view and view["status"] == "running" and view["progress"] is None and \
            time.monotonic() < deadline:  # the first progress report follows the first sweep
        time.sleep(0.02)
        view = client.call("GET", "/v1/jobs/{id}", {"id": job_id}).json()
    R.check("d: slow solve is running and reports progress",
            view is not None and view["status"] == "running" and view["progress"] is not None,
            str(view))
    pump, rand = m["pump_id"], m["rand_id"]
    work = []
    for state in ("worn_peak", "failed_off", "new_peak", "good_off"):
        work.append((pump, state, m["answers"][pump][state], m["solutions"][pump]))
    for state in ("cell-00", "cell-03", "cell-11", "goal"):
        work.append((rand, state, m["answers"][rand][state], None))
    batch = {"states": ["cell-%02d" % i for i in range(39)] + ["goal"]}
    batch_want = client.call("POST", "/v1/models/{id}/policy/batch", {"id": rand}, body=batch,
                             expect=200, name="d: sequential batch answer").body
    threads_n, per_thread = 4, 150
    results = []
    lock = threading.Lock()

    def worker(k):
        local = []
        for i in range(per_thread):
            mid, state, want, sid = work[(k * 7 + i) % len(work)]
            query = {"state": state}
            if sid:
                query["solution_id"] = sid
            try:
                if i % 10 == 9:
                    resp = client.call("POST", "/v1/models/{id}/policy/batch", {"id": rand},
                                       body=batch)
                    want = batch_want
                else:
                    resp = client.call("GET", "/v1/models/{id}/policy", {"id": mid}, query)
                local.append((resp.status == 200 and not resp.problems and resp.body == want,
                              resp.status))
            except Exception as e:  # noqa: BLE001 - counted as a failed answer
                local.append((False, repr(e)))
        with lock:
            results.extend(local)

    threads = [threading.Thread(target=worker, args=(k,)) for k in range(threads_n)]
    start = time.monotonic()
    for t in threads:
        t.start()
    polls = []
    while any(t.is_alive() for t in threads):
        resp = client.call("GET", "/v1/jobs/{id}", {"id": job_id})
        polls.append(resp.status == 200 and not resp.problems and
                     resp.json()["status"] == "running" and resp.json()["progress"] is not None)
        time.sleep(0.05)
    for t in threads:
        t.join(timeout=HTTP_TIMEOUT)
    seconds = time.monotonic() - start
    bad = [r for r in results if not r[0]]
    R.check("d: %d concurrent queries (%d threads, 1 in 10 a batch of 40) in %.2f s: all 200 "
            "and identical to the sequential answers" % (len(results), threads_n, seconds),
            len(results) == threads_n * per_thread and not bad, str(bad[:3]))
    R.check("d: the solve was running with progress throughout (%d polls)" % len(polls),
            polls and all(polls))
    resp = client.call("POST", "/v1/jobs", body={"model_id": m["slow_id"],
                                                 "options": slow_options(30)},
                       expect=202, name="d: the same solve while it runs")
    R.check("d: the running job is returned, not a new one",
            resp.status == 202 and resp.json()["id"] == job_id)
    resp = client.call("POST", "/v1/jobs/{id}/cancel", {"id": job_id}, expect=200,
                       name="d: cancel the running solve")
    view = wait_job(client, job_id, ("cancelled", "failed", "succeeded"), timeout=20)
    R.check("d: cancelled job ends as cancelled without a solution",
            view is not None and view["status"] == "cancelled" and view["solution_id"] is None
            and view["error"], str(view))
    resp = client.call("GET", "/v1/models/{id}/policy", {"id": m["slow_id"]}, {"state": "s0"},
                       expect=409, name="d: query the slow model (no solution: cancelled)")
    R.check("d: 409 is a conflict problem",
            resp.status == 409 and resp.json()["type"] == PROBLEM + "conflict")
    m["cancelled_jobs"] = 1


# --------------------------------------------------------------------------------------------
# (e) Bad requests

def read_response(sock, whole=False):
    """The bytes of one response on `sock`: read until the connection closes, the declared
    body is complete, or the socket's timeout passes; with `whole`, everything until the
    connection closes (or the timeout)."""
    received = b""
    try:
        while True:
            part = sock.recv(65536)
            if not part:
                break
            received += part
            head, sep, body = received.partition(b"\r\n\r\n")
            length = re.search(rb"content-length: *(\d+)", head, re.I)
            if not whole and sep and length and len(body) >= int(length.group(1)):
                break
    except socket.timeout:
        pass
    return received


def parse_response(received):
    """A Resp of the first response in `received` (status 0 if it has no status line)."""
    head, _, body = received.partition(b"\r\n\r\n")
    lines = head.decode("latin-1").split("\r\n")
    first = lines[0].split()
    status = int(first[1]) if len(first) > 1 and first[1].isdigit() else 0
    headers = {}
    for line in lines[1:]:
        k, _, v = line.partition(":")
        headers[k.strip().lower()] = v.strip()
    return Resp(status, headers, body)


def raw_exchange(port, data):
    """Sends raw bytes on a new connection; returns the first response (read_response, with
    10 s to answer)."""
    with socket.create_connection(("127.0.0.1", port), timeout=10) as s:
        s.sendall(data)
        return parse_response(read_response(s))


def chunked(data, piece=1000):
    """`data` in HTTP/1.1 chunked transfer coding, `piece` bytes per chunk."""
    out = b""
    for i in range(0, len(data), piece):
        part = data[i:i + piece]
        out += b"%x\r\n" % len(part) + part + b"\r\n"
    return out + b"0\r\n\r\n"


def dechunked(data):
    """The body carried by `data` in the chunked transfer coding (no trailer fields), or None
    if it is not well framed or not complete."""
    out = b""
    while True:
        line, sep, data = data.partition(b"\r\n")
        try:
            size = int(line, 16)
        except ValueError:
            return None
        if not sep or len(data) < size + 2 or data[size:size + 2] != b"\r\n":
            return None
        if size == 0:
            return out if data == b"\r\n" else None
        out += data[:size]
        data = data[size + 2:]


def upload_head(headers):
    return (b"POST /v1/models HTTP/1.1\r\nHost: 127.0.0.1\r\nConnection: close\r\n"
            b"Content-Type: application/json\r\n" + headers + b"\r\n")


def upload_cut_short(port, doc):
    """Declares the whole document's length, sends half of it and stops sending (the write
    side closed); returns (status, body) of the response, status 0 if none came."""
    with socket.create_connection(("127.0.0.1", port), timeout=10) as s:
        s.sendall(upload_head(b"Content-Length: %d\r\n" % len(doc)) + doc[:len(doc) // 2])
        s.shutdown(socket.SHUT_WR)
        received = read_response(s)
    head, _, body = received.partition(b"\r\n\r\n")
    first = head.decode("latin-1").split("\r\n")[0].split()
    status = int(first[1]) if len(first) > 1 and first[1].isdigit() else 0
    return status, body


def scenario_e(api, server, root):
    client = Client(api, server)
    pump = load_example(root, "pump-maintenance.json")
    robot = load_example(root, "warehouse-robot.json")
    pid = upload(client, pump, 201, "e: upload pump model")
    rid = upload(client, robot, 201, "e: upload robot model (left unsolved)")
    view, sid = solve(client, pid, None, "e: pump")
    resp = client.call("GET", "/v1/models/{id}/policy", {"id": pid}, {"state": "worn_peak"},
                       expect=200, name="e: a good query first")
    good_answer = resp.body
    deep_array = b"[" * 100 + b"]" * 100
    deep_object = b'{"a":' * 100 + b"1" + b"}" * 100
    bad_model = {"format": "mdpserve/model@1", "name": "broken", "objective": "maximize",
                 "criterion": {"kind": "discounted", "discount": 1.5}, "actions": ["go"],
                 "states": [{"name": "x", "actions": [{"action": "go", "outcomes": [
                     {"next": "nowhere", "probability": 0.7}, {"next": "x",
                                                               "probabilty": 0.3}]}]}]}
    big = {"format": "mdpserve/model@1", "name": "big", "description": "x" * 70000}
    M, J = {"id": pid}, "/v1/jobs"
    table = [
        # name, method, template, params, query, body(bytes|obj), ctype, status, type, pointers
        ("malformed JSON body (batch)", "POST", "/v1/models/{id}/policy/batch", M, None,
         b'{"states": [', "application/json", 400, "malformed-json", None),
        ("malformed JSON body (solve)", "POST", J, None, None, b"{model_id}",
         "application/json", 400, "malformed-json", None),
        ("malformed JSON body (verify)", "POST", "/v1/models/{id}/verify", M, None,
         b'{"values": {', "application/json", 400, "malformed-json", None),
        ("malformed JSON body (upload)", "POST", "/v1/models", None, None, b'{"format": ',
         "application/json", 400, "malformed-json", ["/format"]),
        # A byte that is not UTF-8 in a string: answered 500 until the parser's message,
        # which quotes it, was escaped (found by tests/fuzz/service_api_fuzz).
        ("a byte that is not UTF-8 (upload)", "POST", "/v1/models", None, None,
         b'{"format": "mdpserve/model@1", "name": "Green\xf8house"}', "application/json", 400,
         "malformed-json", ["/name"]),
        ("a byte that is not UTF-8 (verify)", "POST", "/v1/models/{id}/verify", M, None,
         b'{"format": "mdpserve/values@1", "values": {"\xa0": 1}}', "application/json", 400,
         "malformed-json", None),
        ("a byte that is not UTF-8 (simulation)", "POST", "/v1/models/{id}/simulations", M,
         None, b'{"start": {"worn_peak\xc3": 1}}', "application/json", 400, "malformed-json",
         None),
        ("upload as text/plain", "POST", "/v1/models", None, None, pump, "text/plain", 415,
         "unsupported-media-type", None),
        ("solve without a content type", "POST", J, None, None, {"model_id": pid}, None, 415,
         "unsupported-media-type", None),
        ("body over --body-limit", "POST", "/v1/models", None, None, big, "application/json",
         413, "payload-too-large", None),
        ("invalid model", "POST", "/v1/models", None, None, bad_model, "application/json", 422,
         "invalid-model", ["/criterion/discount", "/states/0/actions/0/outcomes/0/next",
                           "/states/0/actions/0/outcomes/1/probabilty"]),
        ("model missing required members", "POST", "/v1/models", None, None,
         {"format": "mdpserve/model@1"}, "application/json", 422, "invalid-model",
         ["/name", "/objective", "/criterion", "/actions", "/states"]),
        ("unknown model id", "GET", "/v1/models/{id}", {"id": "0" * 32}, None, None, None, 404,
         "not-found", None),
        ("document of an unknown model", "GET", "/v1/models/{id}/document", {"id": "nope"},
         None, None, None, 404, "not-found", None),
        ("delete an unknown model", "DELETE", "/v1/models/{id}", {"id": "nope"}, None, None,
         None, 404, "not-found", None),
        ("query without state", "GET", "/v1/models/{id}/policy", M, None, None, None, 400,
         "invalid-request", None),
        ("explain without state", "GET", "/v1/models/{id}/policy/explain", M, None, None, None,
         400, "invalid-request", None),
        ("unknown state", "GET", "/v1/models/{id}/policy", M, {"state": "melted"}, None, None,
         404, "not-found", None),
        ("unknown state (explain)", "GET", "/v1/models/{id}/policy/explain", M,
         {"state": "Worn_peak"}, None, None, 404, "not-found", None),
        ("query an unknown model", "GET", "/v1/models/{id}/policy", {"id": "f" * 32},
         {"state": "worn_peak"}, None, None, 404, "not-found", None),
        ("query an unknown solution", "GET", "/v1/models/{id}/policy", M,
         {"state": "worn_peak", "solution_id": "0" * 32}, None, None, 404, "not-found", None),
        ("batch with unknown states", "POST", "/v1/models/{id}/policy/batch", M, None,
         {"states": ["worn_peak", "melted", "new_off", 7]}, "application/json", 422,
         "unknown-states", ["/states/1", "/states/3"]),
        ("batch with no states", "POST", "/v1/models/{id}/policy/batch", M, None,
         {"states": []}, "application/json", 400, "invalid-request", None),
        ("solve option out of range (tolerance 0)", "POST", J, None, None,
         {"model_id": pid, "options": {"tolerance": 0}}, "application/json", 400,
         "invalid-request", None),
        ("solve option out of range (threads 1000)", "POST", J, None, None,
         {"model_id": pid, "options": {"threads": 1000}}, "application/json", 400,
         "invalid-request", None),
        ("solve option of the wrong type", "POST", J, None, None,
         {"model_id": pid, "options": {"max_iterations": "many"}}, "application/json", 400,
         "invalid-request", None),
        ("unknown solve method", "POST", J, None, None,
         {"model_id": pid, "options": {"method": "guess"}}, "application/json", 400,
         "invalid-request", None),
        ("unknown option", "POST", J, None, None,
         {"model_id": pid, "options": {"tolerence": 1e-6}}, "application/json", 400,
         "invalid-request", None),
        ("solve without model_id", "POST", J, None, None, {"options": {}}, "application/json",
         400, "invalid-request", None),
        ("solve an unknown model", "POST", J, None, None, {"model_id": "nope"},
         "application/json", 404, "not-found", None),
        ("unknown job id", "GET", "/v1/jobs/{id}", {"id": "j" + "0" * 32}, None, None, None,
         404, "not-found", None),
        ("cancel an unknown job", "POST", "/v1/jobs/{id}/cancel", {"id": "jnope"}, None, b"",
         None, 404, "not-found", None),
        ("cancel a finished job", "POST", "/v1/jobs/{id}/cancel", {"id": view["id"]}, None, b"",
         None, 409, "conflict", None),
        ("list jobs with an unknown status", "GET", J, None, {"status": "done"}, None, None,
         400, "invalid-request", None),
        ("list jobs with limit 0", "GET", J, None, {"limit": "0"}, None, None, 400,
         "invalid-request", None),
        ("query a model with no solution yet", "GET", "/v1/models/{id}/policy", {"id": rid},
         {"state": "r0c0"}, None, None, 409, "conflict", None),
        ("batch on a model with no solution yet", "POST", "/v1/models/{id}/policy/batch",
         {"id": rid}, None, {"states": ["r0c0"]}, "application/json", 409, "conflict", None),
        ("verify a policy with no solution yet", "POST", "/v1/models/{id}/verify", {"id": rid},
         None, {"format": "mdpserve/policy@1", "policy": {
             st["name"]: st["actions"][0]["action"] for st in robot["states"]
             if not st.get("terminal")}}, "application/json", 409, "conflict", None),
        ("unknown solution report", "GET", "/v1/models/{id}/solutions/{sid}",
         {"id": pid, "sid": "0" * 32}, None, None, None, 404, "not-found", None),
        ("solution of another model", "GET", "/v1/models/{id}/solutions/{sid}/tables",
         {"id": rid, "sid": sid}, None, None, None, 404, "not-found", None),
        ("nesting 100 deep (solve)", "POST", J, None, None, deep_object, "application/json",
         400, "malformed-json", None),
        ("nesting 100 deep (batch)", "POST", "/v1/models/{id}/policy/batch", M, None,
         b'{"states": ' + deep_array + b"}", "application/json", 400, "malformed-json", None),
        ("nesting 100 deep (upload)", "POST", "/v1/models", None, None, deep_array,
         "application/json", 400, "malformed-json", ["/0" * 64]),
        ("verify with both values and policy", "POST", "/v1/models/{id}/verify", M, None,
         {"values": {}, "policy": {}}, "application/json", 400, "invalid-request", None),
        ("verify with a negative tolerance", "POST", "/v1/models/{id}/verify", M, None,
         {"values": {}, "tolerance": -1}, "application/json", 400, "invalid-request", None),
        ("verify candidate with an unknown state", "POST", "/v1/models/{id}/verify", M, None,
         {"format": "mdpserve/values@1",
          "values": dict({s["name"]: 1.0 for s in pump["states"]}, melted=2.0)},
         "application/json", 422, "invalid-candidate", ["/values/melted"]),
        ("verify policy with an unavailable action", "POST", "/v1/models/{id}/verify", M, None,
         {"format": "mdpserve/policy@1",
          "policy": dict({s["name"]: "run" for s in pump["states"]}, new_peak="fly")},
         "application/json", 422, "invalid-candidate", ["/policy/new_peak"]),
        ("verify an unknown model", "POST", "/v1/models/{id}/verify", {"id": "nope"}, None,
         {"values": {}}, "application/json", 404, "not-found", None),
    ]
    for (name, method, template, params, query, body, ctype, status, ptype, pointers) in table:
        raw = body if isinstance(body, bytes) else None
        obj = None if isinstance(body, bytes) else body
        resp = client.call(method, template, params, query, body=obj, raw=raw, ctype=ctype,
                           expect=status, name="e: " + name)
        try:
            problem = resp.json()
        except ValueError:
            problem = {}
        ok = problem.get("type") == PROBLEM + ptype and problem.get("status") == resp.status
        detail = short(resp.body)
        if pointers is not None:
            listed = [e["pointer"] for e in problem.get("errors", [])]
            ok = ok and all(p in listed for p in pointers)
            detail += " pointers %s" % listed
        R.check("e: %s: problem type %s" % (name, ptype), ok, detail)

    # Outside the operations: unknown routes and methods, unreadable HTTP.
    for name, method, path in (("unknown route", "GET", "/v1/nothing"),
                               ("wrong method", "PUT", "/v1/models"),
                               ("id with a dot", "GET", "/v1/models/a.b"),
                               ("id of 65 characters", "GET", "/v1/models/" + "a" * 65)):
        resp = client.call(method, None, {"path": path}, raw=b"" if method == "PUT" else None,
                           ctype=None)
        R.check("e: %s -> 404 no-such-route problem" % name,
                resp.status == 404 and not resp.problems and
                resp.json()["type"] == PROBLEM + "no-such-route", short(resp.body))
    resp = raw_exchange(server.port, b"NONSENSE\r\n\r\n")
    problems = api.check_problem_only(resp, "BadRequestProblem")
    R.check("e: unreadable request line -> 400 problem stating 400",
            resp.status == 400 and not problems, "%s %s %s" % (resp.status, problems,
                                                               short(resp.body)))
    resp = raw_exchange(server.port, b"GET /" + b"a" * 9000 + b" HTTP/1.1\r\nHost: x\r\n\r\n")
    problems = api.check_problem_only(resp, "Problem")
    R.check("e: over-long URI -> 414 problem stating 414",
            resp.status == 414 and not problems and json.loads(resp.body)["status"] == 414,
            "%s %s %s" % (resp.status, problems, short(resp.body)))

    # 429: one worker, one queue slot, slow solves.
    slow = slow_model(120, 3)
    slow_id = upload(client, slow, 201, "e: upload small slow model")
    resp = client.call("POST", J, body={"model_id": slow_id, "options": slow_options(20)},
                       expect=202, name="e: first slow solve")
    first = resp.json()["id"]
    wait_job(client, first, ("running",), timeout=20)
    resp = client.call("POST", J, body={"model_id": slow_id, "options": slow_options(21)},
                       expect=202, name="e: second slow solve (queued)")
    second = resp.json()["id"]
    R.check("e: second solve is queued", resp.json()["status"] == "queued")
    statuses = []
    for k in range(3):
        resp = client.call("POST", J, body={"model_id": slow_id, "options": slow_options(22 + k)},
                           expect=429 if k == 0 else None, name="e: solve with a full queue")
        statuses.append(resp.status)
        if k == 0:
            problem = resp.json()
            R.check("e: queue full -> 429 too-many-requests with Retry-After",
                    problem.get("type") == PROBLEM + "too-many-requests" and
                    int(resp.headers.get("retry-after", "0")) > 0, str(resp.headers))
    R.check("e: every solve beyond the queue is refused with 429", statuses == [429] * 3,
            str(statuses))
    gauges = metric_samples(client.call("GET", "/metrics").body.decode())
    R.check("e: metrics show 1 queued and 1 running job",
            gauges.get(("mdpserve_jobs_queued", ())) == 1 and
            gauges.get(("mdpserve_jobs_running", ())) == 1,
            str({k: v for k, v in gauges.items() if k[0].startswith("mdpserve_jobs_")}))
    resp = client.call("POST", "/v1/jobs/{id}/cancel", {"id": second}, raw=b"", ctype=None,
                       expect=200, name="e: cancel the queued solve")
    R.check("e: a queued job is cancelled at once", resp.json()["status"] == "cancelled")
    client.call("POST", "/v1/jobs/{id}/cancel", {"id": first}, raw=b"", ctype=None,
                expect=200, name="e: cancel the running solve")
    view = wait_job(client, first, ("cancelled", "failed", "succeeded"), timeout=20)
    R.check("e: the running job ends cancelled", view and view["status"] == "cancelled")
    resp = client.call("POST", "/v1/jobs/{id}/cancel", {"id": second}, raw=b"", ctype=None,
                       expect=409, name="e: cancel the cancelled job again")

    # Uploads the service reads into a buffer of its own: chunked bodies (no Content-Length),
    # an empty body, a chunked body over the limit, and a body cut short.
    pump_text = json.dumps(pump).encode()
    resp = raw_exchange(server.port, upload_head(b"Transfer-Encoding: chunked\r\n") +
                        chunked(pump_text))
    R.check("e: chunked upload of the pump model -> 200, the same model id",
            resp.status == 200 and json.loads(resp.body or b"{}").get("id") == pid,
            "%s %s" % (resp.status, short(resp.body)))
    resp = raw_exchange(server.port, upload_head(b"Transfer-Encoding: chunked\r\n") +
                        chunked(json.dumps(big).encode()))
    problems = api.check_problem_only(resp, "Problem")
    R.check("e: chunked upload over --body-limit -> 413 payload-too-large",
            resp.status == 413 and not problems and
            json.loads(resp.body or b"{}").get("type") == PROBLEM + "payload-too-large",
            "%s %s %s" % (resp.status, problems, short(resp.body)))
    # Over the limit, then (once answered) a second request on the same connection: the rest
    # of the chunked body must have been read and dropped, so the second is read as one.
    over = (b"POST /v1/models HTTP/1.1\r\nHost: 127.0.0.1\r\nContent-Type: application/json"
            b"\r\nTransfer-Encoding: chunked\r\n\r\n" + chunked(json.dumps(big).encode()))
    then = b"GET /healthz HTTP/1.1\r\nHost: 127.0.0.1\r\nConnection: close\r\n\r\n"
    statuses = []
    with socket.create_connection(("127.0.0.1", server.port), timeout=10) as s:
        for request in (over, then):
            s.sendall(request)
            statuses += re.findall(rb"^HTTP/1\.1 (\d{3})", read_response(s), re.M)
    R.check("e: after a chunked body over the limit the connection reads its next request",
            statuses == [b"413", b"200"], str(statuses))
    resp = raw_exchange(server.port, upload_head(b"Content-Length: 0\r\n"))
    problem = json.loads(resp.body or b"{}")
    R.check("e: empty upload -> 422 problem saying the document is empty",
            resp.status == 422 and problem.get("status") == 422 and
            any("empty" in e.get("message", "") for e in problem.get("errors", [])),
            "%s %s" % (resp.status, short(resp.body)))
    # A model uploaded nowhere else: the count of stored models below shows it was not kept.
    status, body = upload_cut_short(server.port, json.dumps(slow_model(30, 9)).encode())
    R.check("e: upload cut short -> a 400 problem or no answer", status in (0, 400) and
            (status == 0 or json.loads(body or b"{}").get("status") == 400),
            "%s %s" % (status, short(body)))
    resp = raw_exchange(server.port, upload_head(b"Transfer-Encoding: chunked\r\n") +
                        chunked(pump_text))
    R.check("e: and the next chunked upload still works",
            resp.status == 200 and json.loads(resp.body or b"{}").get("id") == pid,
            "%s %s" % (resp.status, short(resp.body)))

    # The server is still fine.
    client.call("GET", "/healthz", expect=200, name="e: healthz after the bad requests")
    resp = client.call("GET", "/v1/models/{id}/policy", {"id": pid}, {"state": "worn_peak"},
                       expect=200, name="e: earlier model after the bad requests")
    R.check("e: earlier answer unchanged", resp.body == good_answer)
    resp = client.call("GET", "/v1/models", expect=200, name="e: list after the bad requests")
    R.check("e: exactly the three good models stored",
            [x["id"] for x in resp.json()["models"]] == [pid, rid, slow_id])
    resp = client.call("DELETE", "/v1/models/{id}", {"id": rid}, expect=204,
                       name="e: delete a model")
    client.call("GET", "/v1/models/{id}", {"id": rid}, expect=404, name="e: deleted model is gone")


# --------------------------------------------------------------------------------------------
# (f) Token

def scenario_f(api, server, token):
    anon = Client(api, server)
    wrong = Client(api, server, token="not-" + token)
    right = Client(api, server, token=token)
    for label, client in (("no token", anon), ("wrong token", wrong)):
        for method, template, body in (("GET", "/v1/models", None), ("GET", "/metrics", None),
                                       ("GET", "/v1/openapi.json", None),
                                       ("POST", "/v1/jobs", {"model_id": "x"}),
                                       ("POST", "/v1/models", {"format": "mdpserve/model@1"})):
            resp = client.call(method, template, body=body, expect=401,
                               name="f: %s: %s %s" % (label, method, template))
            R.check("f: %s: %s %s: WWW-Authenticate Bearer, unauthorized problem" %
                    (label, method, template),
                    resp.headers.get("www-authenticate", "").startswith("Bearer") and
                    resp.json()["type"] == PROBLEM + "unauthorized")
    resp = anon.call("GET", "/v1/models", headers={"Authorization": token}, expect=401,
                     name="f: token without the Bearer scheme")
    resp = right.call("GET", "/v1/models", expect=200, name="f: right token: list models")
    right.call("GET", "/v1/openapi.json", expect=200, name="f: right token: openapi")
    right.call("GET", "/metrics", expect=200, name="f: right token: metrics")
    anon.call("GET", "/healthz", expect=200, name="f: healthz without token")
    anon.call("GET", "/readyz", expect=200, name="f: readyz without token")
    wrong.call("GET", "/healthz", expect=200, name="f: healthz with a wrong token")


# --------------------------------------------------------------------------------------------
# (g) Metrics

LINE = re.compile(r'^([a-zA-Z_:][a-zA-Z0-9_:]*)(?:\{(.*)\})? ([-+0-9.eEinfaINF]+)$')


def metric_samples(text):
    out = {}
    for line in text.splitlines():
        if not line or line.startswith("#"):
            continue
        match = LINE.match(line)
        if not match:
            out[("unparsable", (line,))] = 0
            continue
        labels = tuple(sorted(re.findall(r'(\w+)="((?:[^"\\]|\\.)*)"', match.group(2) or "")))
        out[(match.group(1), labels)] = float(match.group(3))
    return out


def scenario_g(api, server, m):
    client = Client(api, server)
    text, samples, differ = "", {}, ["not fetched"]
    for _ in range(5):  # a request's metrics are recorded just after its answer is sent
        resp = client.call("GET", "/metrics", expect=None)
        text = resp.body.decode()
        samples = metric_samples(text)
        with server.lock:
            counts = dict(server.counts)
        differ = []
        for (method, route, status), n in counts.items():
            if route == "/metrics":
                continue
            key = ("mdpserve_http_requests_total",
                   (("method", method), ("route", route), ("status", str(status))))
            if samples.get(key) != n:
                differ.append((method, route, status, n, samples.get(key)))
        extra = [k for k in samples if k[0] == "mdpserve_http_requests_total" and
                 dict(k[1])["route"] != "/metrics" and
                 (dict(k[1])["method"], dict(k[1])["route"], int(dict(k[1])["status"]))
                 not in counts]
        differ += extra
        if not differ:
            break
        time.sleep(0.1)
    R.check("g: metrics response is text/plain and parses",
            resp.status == 200 and resp.headers.get("content-type", "").startswith("text/plain")
            and not any(k[0] == "unparsable" for k in samples), short(text))
    routes = {k[1] for k in counts if k[1] != "/metrics"}
    R.check("g: mdpserve_http_requests_total equals this test's requests for %d routes "
            "(%d requests)" % (len(routes), sum(counts.values())), not differ, str(differ[:4]))
    bad = []
    for method, route in {(k[0], k[1]) for k in counts if k[1] != "/metrics"}:
        labels = (("method", method), ("route", route))
        n = sum(v for (mm, rr, _), v in counts.items() if (mm, rr) == (method, route))
        count = samples.get(("mdpserve_http_request_duration_seconds_count", labels))
        inf = samples.get(("mdpserve_http_request_duration_seconds_bucket",
                           tuple(sorted(labels + (("le", "+Inf"),)))))
        total = samples.get(("mdpserve_http_request_duration_seconds_sum", labels))
        if count != n or inf != n or total is None or total < 0:
            bad.append((method, route, n, count, inf, total))
    R.check("g: mdpserve_http_request_duration_seconds count, +Inf bucket and sum per route",
            not bad, str(bad[:3]))
    for gauge in ("mdpserve_jobs_queued", "mdpserve_jobs_running", "mdpserve_cache_warming"):
        R.check("g: gauge %s is 0 when idle" % gauge, samples.get((gauge, ())) == 0,
                str(samples.get((gauge, ()))))
    R.check("g: cache gauges: bytes and entries > 0, budget 2 GiB",
            samples.get(("mdpserve_cache_bytes", ())) > 0 and
            samples.get(("mdpserve_cache_entries", ())) > 0 and
            samples.get(("mdpserve_cache_budget_bytes", ())) == 2 ** 31)
    hits = samples.get(("mdpserve_cache_requests_total", (("result", "hit"),)), 0)
    R.check("g: cache hits counted", hits > 0, str(hits))
    solve_labels = (("kind", "solve"),)
    count = samples.get(("mdpserve_job_duration_seconds_count", solve_labels))
    buckets = sorted(((float(dict(k[1])["le"]), v) for k, v in samples.items()
                      if k[0] == "mdpserve_job_duration_seconds_bucket" and
                      dict(k[1]).get("kind") == "solve"))
    finished = m["solves"] + m["cancelled_jobs"]
    R.check("g: job duration histogram: %d solve jobs, cumulative buckets" % finished,
            count == finished and buckets and buckets[-1][1] == count and
            all(a[1] <= b[1] for a, b in zip(buckets, buckets[1:])), "%s %s" % (count, buckets))
    R.check("g: jobs finished by status",
            samples.get(("mdpserve_jobs_finished_total",
                         (("kind", "solve"), ("status", "succeeded")))) == m["solves"] and
            samples.get(("mdpserve_jobs_finished_total",
                         (("kind", "solve"), ("status", "cancelled")))) == m["cancelled_jobs"])


# --------------------------------------------------------------------------------------------

# --------------------------------------------------------------------------------------------
# (h) criteria other than discounting: answers checked against values derived by hand below


def criterion_model(name, objective, criterion, actions, states):
    return {"format": "mdpserve/model@1", "name": name, "objective": objective,
            "criterion": criterion, "actions": actions, "states": states}


def saver_model():
    """Finite horizon H = 6, undiscounted. Poor: consume (+1, stay) or invest (-4, become
    rich); rich: collect (+3, stay). With k periods to go V_k(rich) = 3k and V_k(poor) =
    max(1 + V_{k-1}(poor), -4 + 3(k-1)): 1, 2, 3, 5, 8, 11 for k = 1..6, investing iff
    k >= 4 (k = 4: 5 > 4; k = 3: 3 > 2)."""
    return criterion_model("Saver", "maximize", {"kind": "finite_horizon", "horizon": 6},
                           ["consume", "invest", "collect"], [
        {"name": "poor", "actions": [
            {"action": "consume", "reward": 1, "outcomes": [{"next": "poor", "probability": 1}]},
            {"action": "invest", "reward": -4, "outcomes": [{"next": "rich", "probability": 1}]}]},
        {"name": "rich", "actions": [
            {"action": "collect", "reward": 3, "outcomes": [{"next": "rich", "probability": 1}]}]}])


def cycle_model():
    """Average reward. a: stay (+1, stay) or go (0, to b); b: work (+3, back to a). Staying
    earns 1 per step, the cycle (0 + 3) / 2 = 1.5: g* = 1.5 with go at a."""
    return criterion_model("Cycle", "maximize", {"kind": "average"}, ["stay", "go", "work"], [
        {"name": "a", "actions": [
            {"action": "stay", "reward": 1, "outcomes": [{"next": "a", "probability": 1}]},
            {"action": "go", "outcomes": [{"next": "b", "probability": 1}]}]},
        {"name": "b", "actions": [
            {"action": "work", "reward": 3, "outcomes": [{"next": "a", "probability": 1}]}]}])


def drone_model():
    """Total cost to a dock. From cell c_i (i = 0..3) "fly" costs 1 and advances w.p. 0.8
    (stays w.p. 0.2): 1 / 0.8 = 1.25 expected steps per cell, so from c_i the cost and the
    expected steps are both 1.25 (4 - i). At c0 "dash" costs 0.5 and reaches the dock or the
    pit with probability 1/2 each; the pit has only "wait" (cost 0, stays): it cannot reach the
    dock, so dash is unsafe and never the answer however cheap."""
    cells = []
    for i in range(4):
        nxt = "c%d" % (i + 1) if i < 3 else "dock"
        acts = [{"action": "fly", "reward": 1, "outcomes": [
            {"next": nxt, "probability": 0.8}, {"next": "c%d" % i, "probability": 0.2}]}]
        if i == 0:
            acts.append({"action": "dash", "reward": 0.5, "outcomes": [
                {"next": "dock", "probability": 0.5}, {"next": "pit", "probability": 0.5}]})
        cells.append({"name": "c%d" % i, "actions": acts})
    cells.append({"name": "pit", "actions": [
        {"action": "wait", "outcomes": [{"next": "pit", "probability": 1}]}]})
    cells.append({"name": "dock", "terminal": True})
    return criterion_model("Drone", "minimize", {"kind": "total"}, ["fly", "dash", "wait"], cells)


def answer(client, model_id, state, label, expect=200, **query):
    q = {"state": state}
    q.update({k: str(v) for k, v in query.items()})
    resp = client.call("GET", "/v1/models/{id}/policy", {"id": model_id}, query=q, expect=expect,
                       name=label)
    return resp.json() if resp.status == 200 else resp


def scenario_h(api, server):
    client = Client(api, server)
    ids = {}
    for label, doc in (("saver", saver_model()), ("cycle", cycle_model()),
                       ("drone", drone_model())):
        ids[label] = upload(client, doc, 201, "h: upload %s" % label)
        _, sid = solve(client, ids[label], name="h: " + label)
        ids[label + "_solution"] = sid
    saver = ids["saver"]
    k_poor = {1: 1, 2: 2, 3: 3, 4: 5, 5: 8, 6: 11}
    for stage in range(6):
        k = 6 - stage
        a = answer(client, saver, "poor", "h: saver poor at stage %d" % stage, stage=stage)
        R.check("h: saver stage %d: %s, value %d, %d periods remaining" %
                (stage, "invest" if k >= 4 else "consume", k_poor[k], k),
                isinstance(a, dict) and a["action"] == ("invest" if k >= 4 else "consume") and
                close(a["value"], k_poor[k]) and a["stage"] == stage and
                a["periods_remaining"] == k, str(a)[:300])
    a = answer(client, saver, "poor", "h: saver without stage")
    R.check("h: saver without stage is stage 0", isinstance(a, dict) and a["stage"] == 0 and
            a["action"] == "invest" and close(a["value"], 11) and close(a["action_gap"], 2))
    a = answer(client, saver, "poor", "h: saver by periods_remaining", periods_remaining=3)
    R.check("h: periods_remaining 3 is stage 3", isinstance(a, dict) and a["stage"] == 3 and
            a["action"] == "consume")
    for label, query in (("stage 6 (= horizon)", {"stage": 6}), ("stage -1", {"stage": -1}),
                         ("stage abc", {"stage": "abc"}), ("periods_remaining 0",
                                                          {"periods_remaining": 0}),
                         ("both stage and periods_remaining", {"stage": 1,
                                                               "periods_remaining": 5})):
        resp = answer(client, saver, "poor", "h: saver " + label, expect=400, **query)
    resp = client.call("POST", "/v1/models/{id}/policy/batch", {"id": saver},
                       body={"states": ["poor", "rich"], "stage": 5}, expect=200,
                       name="h: saver batch at stage 5")
    if resp.status == 200:
        got = resp.json()["answers"]
        R.check("h: batch at stage 5: consume (1), collect (3)",
                got[0]["action"] == "consume" and close(got[0]["value"], 1) and
                got[1]["action"] == "collect" and close(got[1]["value"], 3))
    resp = client.call("GET", "/v1/models/{id}/policy/explain", {"id": saver},
                       query={"state": "poor", "stage": "2"}, expect=200,
                       name="h: saver explain at stage 2")
    if resp.status == 200:
        q = {x["action"]: x["q"] for x in resp.json()["actions"]}
        # Four periods to go: invest = -4 + V_3(rich) = -4 + 9; consume = 1 + V_3(poor) = 4.
        R.check("h: explain at stage 2: q(invest) 5, q(consume) 4",
                close(q.get("invest"), 5) and close(q.get("consume"), 4), str(q))
    resp = client.call("GET", "/v1/models/{id}/solutions/{sid}/tables",
                       {"id": saver, "sid": ids["saver_solution"]}, query={"stage": "3"},
                       expect=200, name="h: saver tables at stage 3")
    if resp.status == 200:
        doc = resp.json()
        poor = [x for x in doc["states"] if x["state"] == "poor"][0]
        R.check("h: tables at stage 3: consume, value 3, block says stage 3",
                poor["action"] == "consume" and close(poor["value"], 3) and
                doc["finite_horizon"] == {"horizon": 6, "stage": 3, "periods_remaining": 3},
                str(doc.get("finite_horizon")))

    cycle = ids["cycle"]
    a = answer(client, cycle, "a", "h: cycle at a")
    R.check("h: average criterion: go at a, gain 1.5", isinstance(a, dict) and
            a["action"] == "go" and close(a["gain"], 1.5), str(a)[:300])
    answer(client, cycle, "a", "h: stage on an average model", expect=400, stage=0)
    resp = client.call("GET", "/v1/models/{id}/solutions/{sid}",
                       {"id": cycle, "sid": ids["cycle_solution"]}, expect=200,
                       name="h: cycle solution report")
    if resp.status == 200:
        av = resp.json().get("average", {})
        R.check("h: cycle report brackets the gain 1.5",
                av.get("gain_lower", 9) <= 1.5 + 1e-9 <= av.get("gain_upper", -9) + 2e-9 and
                close(av.get("gain"), 1.5), str(av))

    drone = ids["drone"]
    for i in range(4):
        a = answer(client, drone, "c%d" % i, "h: drone at c%d" % i)
        want = 1.25 * (4 - i)
        R.check("h: drone c%d: fly, cost %.2f, %.2f expected steps" % (i, want, want),
                isinstance(a, dict) and a["action"] == "fly" and close(a["value"], want) and
                close(a["expected_steps"], want) and a["reaches_goal"] is True and
                a["optimal_actions"] == ["fly"], str(a)[:300])
    a = answer(client, drone, "c0", "h: drone dash is unsafe")
    R.check("h: unsafe dash has no Q", isinstance(a, dict) and a["q"].get("dash", 0) is None,
            str(a)[:300])
    a = answer(client, drone, "pit", "h: drone pit")
    R.check("h: pit cannot reach the dock: no action, no value", isinstance(a, dict) and
            a["reaches_goal"] is False and a["action"] is None and a["value"] is None and
            a["optimal_actions"] == [], str(a)[:300])
    # Verification under each criterion: a hand-written candidate and a wrong one.
    verify = lambda mid, body, label: client.call(
        "POST", "/v1/models/{id}/verify", {"id": mid}, body=body, expect=200, name=label)
    resp = verify(saver, {"format": "mdpserve/values@1", "values": {"poor": 11, "rich": 18}},
                  "h: saver: verify the derived stage-0 values")
    R.check("h: saver: derived values pass", resp.status == 200 and
            resp.json()["verdict"] == "pass" and resp.json()["criterion"] == "finite_horizon")
    resp = verify(saver, {"format": "mdpserve/values@1", "values": {"poor": 10, "rich": 18}},
                  "h: saver: verify values one short")
    R.check("h: saver: a value one short fails at distance 1", resp.status == 200 and
            resp.json()["verdict"] == "fail" and close(resp.json()["reference_distance"], 1))
    # A bias for the cycle: h(a) = 0, h(b) = 1.5 gives T h - h = 1.5 in both states.
    resp = verify(cycle, {"format": "mdpserve/values@1", "values": {"a": 0, "b": 1.5}},
                  "h: cycle: verify a derived bias")
    R.check("h: cycle: the bias brackets the gain at exactly 1.5", resp.status == 200 and
            resp.json()["verdict"] == "pass" and close(resp.json()["gain_lower"], 1.5) and
            close(resp.json()["gain_upper"], 1.5))
    resp = verify(cycle, {"format": "mdpserve/policy@1", "policy": {"a": "stay", "b": "work"}},
                  "h: cycle: verify staying")
    R.check("h: cycle: staying loses 0.5 per step", resp.status == 200 and
            resp.json()["verdict"] == "fail" and close(resp.json()["max_loss"], 0.5, 1e-7))
    resp = verify(drone, {"format": "mdpserve/policy@1", "policy": {
        "c0": "fly", "c1": "fly", "c2": "fly", "c3": "fly"}}, "h: drone: verify flying")
    R.check("h: drone: flying everywhere passes (pit left out)", resp.status == 200 and
            resp.json()["verdict"] == "pass" and resp.json()["improper_count"] == 0,
            short(resp.body))
    resp = verify(drone, {"format": "mdpserve/policy@1", "policy": {
        "c0": "dash", "c1": "fly", "c2": "fly", "c3": "fly"}}, "h: drone: verify dashing")
    R.check("h: drone: dashing at c0 fails: c0 is improper", resp.status == 200 and
            resp.json()["verdict"] == "fail" and "c0" in resp.json()["improper_states"],
            short(resp.body))
    # Simulations follow each solution's own decisions.
    for mid, start, episodes, exact, label in (
            (saver, "poor", 200, 11.0, "saver"), (drone, "c0", 4000, 5.0, "drone")):
        resp = client.call("POST", "/v1/models/{id}/simulations", {"id": mid}, body={
            "start": {start: 1.0}, "episodes": episodes, "max_steps": 5000, "seed": 3,
            "confidence": 0.999}, expect=202, name="h: %s: start a simulation" % label)
        if resp.status != 202:
            continue
        job = wait_job(client, resp.json()["id"], ("succeeded", "failed", "cancelled"))
        result = (job or {}).get("result") or {}
        ci = result.get("return", {}).get("confidence_interval", {})
        R.check("h: %s: simulated mean covers %g" % (label, exact),
                job is not None and job["status"] == "succeeded" and
                (ci.get("low") or 0) - 1e-9 <= exact <= (ci.get("high") or 0) + 1e-9,
                short(json.dumps(result)))
    # Two criteria of one model: the saver over 3 periods consumes where 6 periods invest.
    short_saver = saver_model()
    short_saver["criterion"]["horizon"] = 3
    short_id = upload(client, short_saver, 201, "h: upload the 3-period saver")
    solve(client, short_id, name="h: 3-period saver")
    resp = client.call("GET", "/v1/models/{id}/compare", {"id": saver}, {"with": short_id},
                       expect=200, name="h: compare 6 and 3 periods")
    if resp.status == 200:
        c = resp.json()
        changes = {x["state"]: (x["action_a"], x["action_b"]) for x in c["optimal_set_changes"]}
        R.check("h: comparing horizons: poor invest -> consume, not the same criterion",
                changes == {"poor": ("invest", "consume")} and c["same_criterion"] is False and
                c["criterion_a"] == c["criterion_b"] == "finite_horizon", short(resp.body))
    resp = client.call("GET", "/v1/models/{id}/compare", {"id": cycle}, {"with": saver},
                       expect=200, name="h: compare an average and a finite-horizon model")
    if resp.status == 200:
        c = resp.json()
        R.check("h: across criteria values are not comparable and none counts as changed",
                c["values_comparable"] is False and c["value_changed_count"] == 0 and
                c["common_states"] == 0, short(resp.body))
    # Bytes per cached model and solution in /metrics. The saver's arrays alone take at least
    # 2 states x (1 + 8) + 8 + 3 rows x (4 + 8 + 8) + 8 + 3 entries x (4 + 8) = 130 bytes.
    resp = client.call("GET", "/metrics", expect=None)
    samples = metric_samples(resp.body.decode() if isinstance(resp.body, bytes) else resp.body)
    model_bytes = samples.get(("mdpserve_cached_model_bytes", (("model", saver),)))
    solution_bytes = samples.get(("mdpserve_cached_solution_bytes",
                                  (("solution", ids["saver_solution"]),)))
    R.check("h: /metrics lists the saver's model bytes (>= 130) and solution bytes",
            model_bytes is not None and model_bytes >= 130 and
            solution_bytes is not None and solution_bytes > 0,
            "model %s solution %s" % (model_bytes, solution_bytes))
    # A loop that earns reward while avoiding the goal makes the maximum total unbounded.
    looping = criterion_model("Looping", "maximize", {"kind": "total"}, ["spin", "leave"], [
        {"name": "wheel", "actions": [
            {"action": "spin", "reward": 2, "outcomes": [{"next": "wheel", "probability": 1}]},
            {"action": "leave", "outcomes": [{"next": "exit", "probability": 1}]}]},
        {"name": "exit", "terminal": True}])
    loop_id = upload(client, looping, 201, "h: upload looping")
    resp = client.call("POST", "/v1/jobs", body={"model_id": loop_id}, expect=202,
                       name="h: looping: start job")
    if resp.status == 202:
        view = wait_job(client, resp.json()["id"], ("succeeded", "failed", "cancelled"))
        R.check("h: looping: job fails naming the loop", view is not None and
                view["status"] == "failed" and "wheel" in (view.get("error") or ""),
                str(view)[:400])
    resp = client.call("POST", "/v1/jobs", body={"model_id": cycle, "options": {
        "method": "value_iteration"}}, expect=400, name="h: cycle with value_iteration")
    R.check("h: a method of another criterion is refused naming the ones that apply",
            resp.status == 400 and "relative_value_iteration" in resp.json().get("detail", ""),
            short(resp.body))
    resp = client.call("POST", "/v1/jobs", body={"model_id": saver, "options": {
        "method": "backward_induction", "tolerance": 1e-9}}, expect=202,
        name="h: saver with backward_induction named")
    if resp.status == 202:
        view = wait_job(client, resp.json()["id"], ("succeeded", "failed", "cancelled"))
        R.check("h: naming the criterion's own method works",
                view is not None and view["status"] == "succeeded", str(view)[:400])



def scenario_i(api, server, root, label):
    """--store-value-limit: a valid model whose stored form is over the store's limit is
    refused with a 413 problem naming the stored form, nothing is kept, and the service goes
    on taking models that fit."""
    client = Client(api, server)
    big = slow_model(2000, 9)  # 2,000 states x 2 actions x 3 outcomes: tens of kB stored.
    resp = client.call("POST", "/v1/models", body=big, expect=413,
                       name="i(%s): model over the store's limit" % label)
    problem = resp.json() if resp.status == 413 else {}
    R.check("i(%s): 413 payload-too-large problem naming the stored form" % label,
            problem.get("type") == PROBLEM + "payload-too-large" and
            problem.get("status") == 413 and "stored form" in problem.get("detail", ""),
            short(resp.body))
    resp = client.call("GET", "/v1/models", expect=200, name="i(%s): list models" % label)
    R.check("i(%s): nothing was stored" % label, resp.json().get("models") == [],
            short(resp.body))
    pump = load_example(root, "pump-maintenance.json")
    pid = upload(client, pump, 201, "i(%s): a model under the limit still uploads" % label)
    if pid is not None:
        view, _ = solve(client, pid, None, "i(%s): and solves" % label)
        R.check("i(%s): the small model's solve succeeds" % label,
                view is not None and view["status"] == "succeeded", str(view)[:300])


# --------------------------------------------------------------------------------------------
# (j) Connections: silent clients hold no thread, pipelining, HEAD, framing errors, timeouts

def split_responses(data):
    """The (status, headers, body) of each complete response in `data`, in order: bodies
    framed by Content-Length, none after HEAD-like responses marked by `no_body`."""
    out = []
    while data:
        head, sep, rest = data.partition(b"\r\n\r\n")
        if not sep:
            break
        lines = head.decode("latin-1").split("\r\n")
        headers = {}
        for line in lines[1:]:
            k, _, v = line.partition(":")
            headers[k.strip().lower()] = v.strip()
        length = int(headers.get("content-length", "0"))
        out.append((int(lines[0].split()[1]), headers, rest[:length]))
        data = rest[length:]
    return out


def socket_open(sock):
    """True iff the server has not closed `sock` (nothing to read and no end of input)."""
    sock.setblocking(False)
    try:
        return sock.recv(1) != b""  # b"": the server closed it.
    except BlockingIOError:
        return True
    except OSError:
        return False
    finally:
        sock.setblocking(True)


def wait_closed(sock, seconds):
    """True iff the server closes `sock` within `seconds` (end of input or a reset)."""
    sock.settimeout(seconds)
    try:
        return sock.recv(1) == b""
    except socket.timeout:
        return False
    except OSError:
        return True


def scenario_j(api, server, root, idle_timeout):
    """The server runs with --http-threads 2 and --idle-timeout `idle_timeout`."""
    port = server.port
    health = b"GET /healthz HTTP/1.1\r\nHost: 127.0.0.1\r\n\r\n"
    # Far more silent or half-sent connections than threads: with a thread per connection,
    # two of them would stop the service until they timed out.
    silent = [socket.create_connection(("127.0.0.1", port), timeout=10) for _ in range(40)]
    partial = [socket.create_connection(("127.0.0.1", port), timeout=10) for _ in range(10)]
    for s in partial:
        s.sendall(b"GET /healthz HTTP/1.1\r\nHost: 12")
    time.sleep(0.2)
    resp = raw_exchange(port, b"GET /healthz HTTP/1.1\r\nHost: 127.0.0.1\r\nConnection: close"
                              b"\r\n\r\n")
    still_open = sum(socket_open(s) for s in silent + partial)
    R.check("j: 50 silent or half-sent connections on 2 threads: a new request is answered "
            "while all 50 are still open", resp.status == 200 and still_open == 50,
            "status %s, %d of 50 open" % (resp.status, still_open))
    # A half-sent request completed later is answered on its connection.
    partial[0].sendall(b"7.0.0.1\r\n\r\n")
    got = split_responses(read_response(partial[0]))
    R.check("j: a request sent in two parts is answered", [g[0] for g in got] == [200],
            str([g[0] for g in got]))

    # Clients that ask and never read: their answers (pipelined copies of the 108 kB OpenAPI
    # document, megabytes in all) wait for room in their sockets without holding the 2
    # threads, so another client is still answered.
    greedy = []
    for _ in range(3):
        g = socket.create_connection(("127.0.0.1", port), timeout=10)
        g.setsockopt(socket.SOL_SOCKET, socket.SO_RCVBUF, 4096)
        g.sendall(b"GET /v1/openapi.json HTTP/1.1\r\nHost: 127.0.0.1\r\n\r\n" * 200)
        greedy.append(g)
    time.sleep(0.5)
    resp = raw_exchange(port, b"GET /healthz HTTP/1.1\r\nHost: 127.0.0.1\r\nConnection: close"
                              b"\r\n\r\n")
    R.check("j: 3 clients that send 200 requests each and read nothing: another is answered",
            resp.status == 200, "status %s" % resp.status)
    first = greedy[0].recv(65536)
    R.check("j: and theirs are answered once they read", first.startswith(b"HTTP/1.1 200"),
            short(first, 80))
    for g in greedy:
        g.close()

    # The same with streamed answers: a model's document is written a piece at a time as the
    # client takes it (Transfer-Encoding: chunked), so clients that ask for it and never read
    # must not hold the threads either.
    doc = json.dumps(random_model(8, n=80)).encode()
    resp = raw_exchange(port, upload_head(b"Content-Length: %d\r\n" % len(doc)) + doc)
    model_id = json.loads(resp.body or b"{}").get("id", "")
    R.check("j: a model of %d bytes uploaded" % len(doc), resp.status == 201 and model_id,
            "%s %s" % (resp.status, short(resp.body)))
    get_document = b"GET /v1/models/%s/document HTTP/1.1\r\nHost: 127.0.0.1\r\n\r\n" % (
        model_id.encode())
    with socket.create_connection(("127.0.0.1", port), timeout=10) as s:
        s.sendall(get_document[:-2] + b"Connection: close\r\n\r\n")
        head, _, body = read_response(s, whole=True).partition(b"\r\n\r\n")
    document = dechunked(body)
    R.check("j: the document is streamed (chunked) and decodes to the canonical model",
            head.startswith(b"HTTP/1.1 200") and b"transfer-encoding: chunked" in head.lower()
            and document is not None and json.loads(document)["states"][0]["name"] == "cell-00",
            short(head + b" | " + body, 200))
    greedy = []
    for _ in range(3):
        g = socket.create_connection(("127.0.0.1", port), timeout=10)
        g.setsockopt(socket.SOL_SOCKET, socket.SO_RCVBUF, 4096)
        g.sendall(get_document * 200)
        greedy.append(g)
    time.sleep(0.5)
    resp = raw_exchange(port, b"GET /healthz HTTP/1.1\r\nHost: 127.0.0.1\r\nConnection: close"
                              b"\r\n\r\n")
    R.check("j: 3 clients that ask for a streamed document 200 times each and read nothing: "
            "another is answered", resp.status == 200, "status %s" % resp.status)
    # Once a client reads, its answers arrive in full and in order: the first three of the
    # 200 are each the whole document.
    greedy[0].settimeout(10)
    data = b""
    while data.count(b"\r\n0\r\n\r\n") < 3:
        part = greedy[0].recv(1 << 20)
        if not part:
            break
        data += part
    answers = data.split(b"\r\n0\r\n\r\n")[:3]
    bodies = [dechunked(a.partition(b"\r\n\r\n")[2] + b"\r\n0\r\n\r\n") for a in answers]
    R.check("j: and theirs arrive whole once they read (3 of 200 checked)",
            len(bodies) == 3 and all(b == document for b in bodies),
            "%d answers, %s" % (len(bodies), [len(b or b"") for b in bodies]))
    for g in greedy:
        g.close()
    # HEAD of a streamed answer: the head alone, and the connection reads on.
    with socket.create_connection(("127.0.0.1", port), timeout=10) as s:
        s.sendall(get_document.replace(b"GET ", b"HEAD ", 1) + health[:-2] +
                  b"Connection: close\r\n\r\n")
        data = read_response(s, whole=True)
    head, _, rest = data.partition(b"\r\n\r\n")
    after = split_responses(rest)
    R.check("j: HEAD of a streamed document: its head, no body, then the next answer",
            head.startswith(b"HTTP/1.1 200") and b"transfer-encoding: chunked" in head.lower()
            and [a[0] for a in after] == [200] and after[0][2] == b'{"status":"ok"}',
            short(data, 200))
    # HTTP/1.0 has no chunked coding: the body goes unframed and the connection closes.
    with socket.create_connection(("127.0.0.1", port), timeout=10) as s:
        s.sendall(get_document.replace(b"HTTP/1.1", b"HTTP/1.0", 1))
        head, _, body = read_response(s, whole=True).partition(b"\r\n\r\n")
    R.check("j: HTTP/1.0: the streamed document unframed, then the connection closes",
            head.startswith(b"HTTP/1.1 200") and b"transfer-encoding" not in head.lower() and
            b"connection: close" in head.lower() and body == document, short(head, 200))

    # Pipelining: three requests in one write, three answers in order; HEAD has no body.
    with socket.create_connection(("127.0.0.1", port), timeout=10) as s:
        s.sendall(health + b"HEAD /healthz HTTP/1.1\r\nHost: 127.0.0.1\r\n\r\n" +
                  b"GET /readyz HTTP/1.1\r\nHost: 127.0.0.1\r\nConnection: close\r\n\r\n")
        data = read_response(s, whole=True)
    # split_responses frames by Content-Length, so strip the HEAD answer's body by hand.
    first, _, rest = data.partition(b"\r\n\r\n")
    get_length = int(re.search(rb"content-length: *(\d+)", first, re.I).group(1))
    get_body, rest = rest[:get_length], rest[get_length:]
    head_head, _, rest = rest.partition(b"\r\n\r\n")
    last = split_responses(rest)
    head_length = re.search(rb"content-length: *(\d+)", head_head, re.I)
    R.check("j: three pipelined requests (GET, HEAD, GET) answered in order",
            first.startswith(b"HTTP/1.1 200") and get_body == b'{"status":"ok"}' and
            head_head.startswith(b"HTTP/1.1 200") and len(last) == 1 and last[0][0] == 200 and
            json.loads(last[0][2]) == {"status": "ready"}, short(data))
    R.check("j: HEAD: the GET's Content-Length and no body",
            head_length is not None and int(head_length.group(1)) == len(get_body),
            short(head_head))
    R.check("j: Connection: close is answered with Connection: close and the connection ends",
            last and last[0][1].get("connection") == "close", str(last and last[0][1]))

    # Framing the service refuses, each with a problem stating its status.
    for name, raw, status in (
            ("HTTP/2.0 request line", b"GET /healthz HTTP/2.0\r\nHost: x\r\n\r\n", 505),
            ("a transfer coding other than chunked",
             b"POST /v1/models HTTP/1.1\r\nHost: x\r\nTransfer-Encoding: gzip\r\n\r\n", 501),
            ("both Content-Length and Transfer-Encoding",
             b"POST /v1/models HTTP/1.1\r\nHost: x\r\nContent-Length: 3\r\n"
             b"Transfer-Encoding: chunked\r\n\r\n0\r\n\r\n", 400),
            ("a Content-Length that is not a number",
             b"POST /v1/models HTTP/1.1\r\nHost: x\r\nContent-Length: 12abc\r\n\r\n", 400),
            ("two different Content-Length fields",
             b"POST /v1/models HTTP/1.1\r\nHost: x\r\nContent-Length: 2\r\n"
             b"Content-Length: 3\r\n\r\n{}", 400),
            ("a header field without a colon",
             b"GET /healthz HTTP/1.1\r\nHost x\r\n\r\n", 400),
            ("a malformed chunk size",
             b"POST /v1/models HTTP/1.1\r\nHost: x\r\nContent-Type: application/json\r\n"
             b"Transfer-Encoding: chunked\r\n\r\nzz\r\n{}\r\n0\r\n\r\n", 400),
            ("200 header fields",
             b"GET /healthz HTTP/1.1\r\n" + b"".join(b"X-F%d: 1\r\n" % i for i in range(200)) +
             b"\r\n", 431),
            ("header fields over 16 KiB",
             b"GET /healthz HTTP/1.1\r\nX-Big: " + b"a" * 20000 + b"\r\n\r\n", 431)):
        resp = raw_exchange(port, raw)
        problems = api.check_problem_only(resp, "Problem")
        R.check("j: %s -> %d problem stating %d" % (name, status, status),
                resp.status == status and not problems and
                json.loads(resp.body or b"{}").get("status") == status,
                "%s %s %s" % (resp.status, problems, short(resp.body)))

    # Expect: 100-continue: the interim answer, then the body, then the final answer; over
    # the limit, 413 at once and the body is never sent.
    pump = json.dumps(load_example(root, "pump-maintenance.json")).encode()
    with socket.create_connection(("127.0.0.1", port), timeout=10) as s:
        s.sendall(upload_head(b"Content-Length: %d\r\nExpect: 100-continue\r\n" % len(pump)))
        interim = s.recv(65536)
        s.sendall(pump)
        final = split_responses(read_response(s))
    R.check("j: Expect: 100-continue -> 100 Continue, then the upload's 201",
            interim == b"HTTP/1.1 100 Continue\r\n\r\n" and [f[0] for f in final] == [201],
            "%s %s" % (short(interim), [f[0] for f in final]))
    with socket.create_connection(("127.0.0.1", port), timeout=10) as s:
        s.sendall(upload_head(b"Content-Length: 70000\r\nExpect: 100-continue\r\n"))
        final = split_responses(read_response(s))
    R.check("j: Expect: 100-continue over --body-limit -> 413 at once, Connection: close",
            [f[0] for f in final] == [413] and final[0][1].get("connection") == "close",
            str(final))

    # Hostile bytes: seeded garbage and mangled requests, each on its own connection. Any
    # answer is a well-formed status line; afterwards the service still answers.
    rng = random.Random(11)
    valid = (b"POST /v1/models/x/policy/batch?state=a%20b HTTP/1.1\r\nHost: x\r\n"
             b"Content-Type: application/json\r\nContent-Length: 13\r\n\r\n{\"states\":[]}")
    samples = []
    for i in range(60):
        if i % 3 == 0:
            samples.append(bytes(rng.getrandbits(8) for _ in range(rng.randint(1, 3000))))
        else:
            data = bytearray(valid)
            for _ in range(rng.randint(1, 6)):
                at = rng.randrange(len(data))
                op = rng.randrange(4)
                if op == 0:
                    data[at:at + 1] = bytes([rng.choice(b"\r\n\x00 :%?/9\xff")])
                elif op == 1:
                    del data[at:at + rng.randint(1, 8)]
                elif op == 2:
                    data[at:at] = rng.choice([b"\r\n", b"Content-Length: 99999999999\r\n",
                                              b"Transfer-Encoding: chunked\r\n", b"%zz",
                                              b"\r\n\r\n", b"ffffffffffffffff\r\n"])
                else:
                    data = data[:at]
            samples.append(bytes(data))
    malformed_answers = []
    for data in samples:
        with socket.create_connection(("127.0.0.1", port), timeout=3) as s:
            try:
                s.sendall(data)
                s.shutdown(socket.SHUT_WR)
                answer = read_response(s)
            except OSError:
                answer = b""
        if answer and not re.match(rb"HTTP/1\.1 [1-5]\d\d [^\r\n]*\r\n", answer):
            malformed_answers.append(short(answer, 80))
    R.check("j: 60 garbage or mangled requests: every answer starts with a status line",
            not malformed_answers, str(malformed_answers[:3]))
    R.check("j: and the service still answers after them", server.alive() and
            raw_exchange(port, health).status == 200)

    # The idle timeout closes the silent and half-sent connections; the service goes on.
    closed = sum(wait_closed(s, idle_timeout + 5) for s in silent + partial[1:])
    R.check("j: --idle-timeout %d closes all 49 silent or half-sent connections" % idle_timeout,
            closed == 49, "%d closed" % closed)
    for s in silent + partial:
        s.close()
    with socket.create_connection(("127.0.0.1", port), timeout=10) as s:
        s.sendall(health)
        got = split_responses(read_response(s))
        R.check("j: a kept-alive connection is open after its answer", socket_open(s))
        R.check("j: and closed after the idle timeout", wait_closed(s, idle_timeout + 5))
    R.check("j: still answering afterwards", [g[0] for g in got] == [200] and
            raw_exchange(port, health).status == 200)


def scenario_k(api, server):
    """The server runs with --http-threads 1: one thread answers every request with a small
    body, and requests with bodies of 1 MiB or more go to a thread of their own. It starts
    with neither GOMP_SPINCOUNT nor OMP_WAIT_POLICY set, so it sets the spin count itself."""
    port = server.port
    env = openmp_environment(server.proc.pid)
    R.check("k: started without OpenMP settings, the server executed itself again (same "
            "process id) with GOMP_SPINCOUNT=5000", env == ["GOMP_SPINCOUNT=5000"], str(env))
    doc = json.dumps(random_model(12, n=40000)).encode()
    health = b"GET /healthz HTTP/1.1\r\nHost: 127.0.0.1\r\nConnection: close\r\n\r\n"
    with socket.create_connection(("127.0.0.1", port), timeout=60) as up:
        # The upload with a request pipelined behind it on the same connection.
        up.sendall(upload_head(b"Content-Length: %d\r\n" % len(doc)).replace(
            b"Connection: close\r\n", b"") + doc +
            b"GET /healthz HTTP/1.1\r\nHost: 127.0.0.1\r\nConnection: close\r\n\r\n")
        # While the service parses the upload (about a second), another client is answered:
        # by the only connection thread, so the upload's answer is not there yet.
        resp = raw_exchange(port, health)
        up.setblocking(False)
        try:
            early = up.recv(1, socket.MSG_PEEK)
        except BlockingIOError:
            early = b""
        up.setblocking(True)
        R.check("k: a %d MB upload on a 1-thread server: a query on another connection is "
                "answered before the upload is" % (len(doc) >> 20),
                resp.status == 200 and early == b"", "status %s, upload answer %s" % (
                    resp.status, "already there" if early else "not yet there"))
        got = split_responses(read_response(up, whole=True))
    R.check("k: the upload is then answered (201), then the request pipelined behind it",
            [g[0] for g in got] == [201, 200] and json.loads(got[0][2]).get("states") == 40000,
            str([(g[0], short(g[2], 100)) for g in got]))
    model_id = json.loads(got[0][2]).get("id", "") if got else ""
    resp = raw_exchange(port, b"GET /v1/models/%s HTTP/1.1\r\nHost: 127.0.0.1\r\n"
                              b"Connection: close\r\n\r\n" % model_id.encode())
    R.check("k: and the model is there", resp.status == 200 and
            json.loads(resp.body or b"{}").get("states") == 40000, short(resp.body))

    # Six large uploads at once: one is parsed, two wait their turn, and the others are
    # refused with 429 and Retry-After at once (their bodies are not kept); sent again later,
    # they are taken.
    doc = json.dumps(random_model(13, n=12000)).encode()
    request = upload_head(b"Content-Length: %d\r\n" % len(doc)) + doc
    sockets = [socket.create_connection(("127.0.0.1", port), timeout=60) for _ in range(6)]
    for s in sockets:
        s.sendall(request)
    answers = []
    for s in sockets:
        answers.append(parse_response(read_response(s)))
        s.close()
    refused = [a for a in answers if a.status == 429]
    taken = [a for a in answers if a.status in (200, 201)]
    problems = [api.check_response("POST", "/v1/models", a) for a in refused]
    # 3 taken and 3 refused when all six arrive while the first is parsed (about 0.2 s here);
    # on a machine slow enough to finish it sooner, more are taken.
    R.check("k: 6 large uploads at once on a 1-thread server: at least 3 taken (1 parsed, 2 "
            "waiting), the others refused with 429 problems and Retry-After (%d refused)" %
            len(refused), len(taken) >= 3 and refused and len(taken) + len(refused) == 6 and
            not any(problems) and
            all(a.headers.get("retry-after") for a in refused),
            "statuses %s %s" % ([a.status for a in answers], problems[:1]))
    resp = raw_exchange(port, upload_head(b"Content-Length: %d\r\n" % len(doc)) + doc)
    R.check("k: sent again once the others are done, a refused upload is taken",
            resp.status == 200 and json.loads(resp.body).get("states") == 12000,
            "%s %s" % (resp.status, short(resp.body)))

    # The log at --log-level info: a line per refused request (4xx), none per answered one.
    marker = "/v1/models/k-log-marker"
    raw_exchange(port, b"GET /healthz HTTP/1.1\r\nHost: x\r\nConnection: close\r\n\r\n")
    raw_exchange(port, b"GET %s HTTP/1.1\r\nHost: x\r\nConnection: close\r\n\r\n" %
                 marker.encode())
    time.sleep(0.2)
    with open(server.log.name, "rb") as f:
        log = f.read().decode("utf-8", "replace")
    R.check("k: --log-level info logs the 404 and the 429s, not the answered requests",
            "GET /v1/models/{id} 404" in log and " 429 " in log and " 200 " not in log and
            " 201 " not in log, log[-600:])

    # A flood of refused requests writes few log lines (server/log_budget.h: 20 at once, then
    # 10 a second); the next refused request's line says how many were left out, and /metrics
    # counts every one. 500 pipelined requests for an unknown path on one connection.
    def unmatched_404s():
        resp = raw_exchange(port, b"GET /metrics HTTP/1.1\r\nHost: x\r\nConnection: close\r\n\r\n")
        return metric_samples((resp.body or b"").decode()).get(
            ("mdpserve_http_requests_total",
             (("method", "other"), ("route", "unmatched"), ("status", "404"))), 0)
    flood = 500
    counted_before = unmatched_404s()
    with open(server.log.name, "rb") as f:
        log_start = len(f.read())
    started = time.monotonic()
    request = b"GET /v1/k-flood HTTP/1.1\r\nHost: x\r\n\r\n"
    with socket.create_connection(("127.0.0.1", port), timeout=10) as s:
        s.sendall(request * (flood - 1) + request.replace(b"\r\n\r\n",
                                                          b"\r\nConnection: close\r\n\r\n"))
        answers = [r[0] for r in split_responses(read_response(s, whole=True))]
    elapsed = time.monotonic() - started
    time.sleep(0.3)  # Three lines' worth of budget again.
    raw_exchange(port, b"GET /v1/k-flood-after HTTP/1.1\r\nHost: x\r\nConnection: close\r\n\r\n")
    time.sleep(0.2)
    with open(server.log.name, "rb") as f:
        new_lines = f.read()[log_start:].decode("utf-8", "replace").splitlines()
    lines_404 = [l for l in new_lines if "GET unmatched 404" in l]
    summary = [l for l in lines_404 if "were not logged" in l]
    left_out = sum(int(re.search(r"\((\d+) more refused", l).group(1)) for l in summary)
    R.check("k: %d refused requests in %.0f ms: all answered 404, at most 20 + 10 per second of "
            "them logged, the next line says how many were left out (together all %d), and "
            "/metrics counts all %d" % (flood, 1000 * elapsed, flood, flood + 1),
            answers == [404] * flood and len(lines_404) - 1 <= 20 + 10 * elapsed + 1 and
            bool(summary) and summary[-1] == lines_404[-1] and
            len(lines_404) - 1 + left_out == flood and
            unmatched_404s() - counted_before == flood + 1,
            "answers %s, %d lines, summary %s, counted %d" %
            (collections.Counter(answers), len(lines_404), summary[-1:],
             unmatched_404s() - counted_before))

    # Priorities: the threads answering requests keep the process's nice value; the solve
    # worker, the OpenMP threads a solve starts (this server has --solver-threads 2) and the
    # large-request thread run 10 higher (--background-niceness, default 10).
    start = raw_exchange(port, b"POST /v1/jobs HTTP/1.1\r\nHost: x\r\nConnection: close\r\n"
                               b"Content-Type: application/json\r\nContent-Length: %d\r\n\r\n%s" %
                         (len(b'{"model_id": "%s"}' % model_id.encode()),
                          b'{"model_id": "%s"}' % model_id.encode()))
    job_id = json.loads(start.body or b"{}").get("id", "")
    deadline = time.monotonic() + JOB_TIMEOUT
    status = ""
    while time.monotonic() < deadline and status not in ("succeeded", "failed", "cancelled"):
        resp = raw_exchange(port, b"GET /v1/jobs/%s HTTP/1.1\r\nHost: x\r\nConnection: close"
                                  b"\r\n\r\n" % job_id.encode())
        status = json.loads(resp.body or b"{}").get("status", "")
        time.sleep(0.05)
    threads = thread_table(server.proc.pid)
    base = threads.get(server.proc.pid, ("", None))[1]
    by_name = {}
    for tid, (name, nice) in threads.items():
        by_name.setdefault(name, []).append(nice)
    expected = {"mdp-http": [base], "mdp-upload": [min(19, base + 10)],
                "mdp-solve": [min(19, base + 10)] * 2}
    R.check("k: after a solve on 2 threads: 1 mdp-http thread at the process's nice value "
            "(%s), 1 mdp-upload and 2 mdp-solve threads (the worker and its OpenMP thread) "
            "10 higher" % base, status == "succeeded" and
            {k: sorted(by_name.get(k, [])) for k in expected} == expected,
            "job %s %s, threads %s" % (job_id, status, by_name))

    # Time slices: the threads answering requests ask for 100 us (--http-slice-us, default
    # 100) where the kernel has per-thread slices (Linux 6.12 and later); the others keep the
    # kernel's default. On older kernels every thread keeps the default and the log says so.
    slices = thread_slices(server.proc.pid)
    by_name = {}
    for name, slice_ns in slices.values():
        by_name.setdefault(name, set()).add(slice_ns)
    default = by_name.get("mdp-solve", {None})
    with open(server.log.name, "rb") as f:
        log = f.read().decode("utf-8", "replace")
    if kernel_has_thread_slices():
        R.check("k: the mdp-http thread runs in 100 us slices, the solve and upload threads in "
                "the kernel's default, and the start log says so",
                by_name.get("mdp-http") == {100000} and len(default) == 1 and
                default != {100000} and by_name.get("mdp-upload") == default and
                "HTTP threads' time slice: 100 us" in log, "%s\n%s" % (by_name, log[:400]))
    else:
        R.check("k: this kernel has no per-thread slices: every thread keeps the default and "
                "the log says so", by_name.get("mdp-http") == default and
                "keep the kernel's default time slice" in log, "%s\n%s" % (by_name, log[:400]))


def kernel_has_thread_slices():
    """Whether the running Linux kernel (6.12 and later) lets a thread set its time slice."""
    release = os.uname().release.split("-")[0].split(".")
    try:
        return (int(release[0]), int(release[1])) >= (6, 12)
    except (IndexError, ValueError):
        return False


def thread_slices(pid):
    """{thread id: (name, time slice in ns or None)} of process `pid`, from /proc."""
    out = {}
    for task in glob.glob("/proc/%d/task/*" % pid):
        try:
            with open(os.path.join(task, "comm")) as f:
                name = f.read().strip()
            with open(os.path.join(task, "sched")) as f:
                lines = f.read().splitlines()
        except OSError:
            continue  # The thread ended meanwhile, or no scheduler statistics.
        slice_ns = None
        for line in lines:
            if line.startswith("se.slice"):
                slice_ns = int(line.split(":")[1])
        out[int(os.path.basename(task))] = (name, slice_ns)
    return out


def openmp_environment(pid):
    """The OpenMP variables in the environment process `pid` was executed with."""
    with open("/proc/%d/environ" % pid, "rb") as f:
        return sorted(e.decode() for e in f.read().split(b"\0")
                      if e.startswith(b"GOMP_") or e.startswith(b"OMP_"))


def scenario_openmp(server):
    """A server started with OMP_WAIT_POLICY set keeps it and gets no GOMP_SPINCOUNT."""
    env = openmp_environment(server.proc.pid)
    R.check("openmp: OMP_WAIT_POLICY=passive given: kept, no GOMP_SPINCOUNT added",
            env == ["OMP_WAIT_POLICY=passive"], str(env))
    # This server has --http-slice-us 0: its HTTP threads keep the kernel's default slice.
    slices = {}
    for name, slice_ns in thread_slices(server.proc.pid).values():
        slices.setdefault(name, set()).add(slice_ns)
    R.check("openmp: with --http-slice-us 0 the mdp-http threads keep the slice of the "
            "solve thread (the kernel's default)", len(slices.get("mdp-http", ())) == 1 and
            slices.get("mdp-http") == slices.get("mdp-solve"), str(slices))
    code, _ = server.terminate()
    R.check("openmp: the server stops with exit code 0", code == 0, str(code))


def thread_table(pid):
    """{thread id: (name, nice value)} of process `pid`, from /proc."""
    out = {}
    for task in glob.glob("/proc/%d/task/*" % pid):
        try:
            with open(os.path.join(task, "stat")) as f:
                stat = f.read()
        except OSError:
            continue  # The thread ended meanwhile.
        name = stat[stat.index("(") + 1:stat.rindex(")")]
        fields = stat[stat.rindex(")") + 2:].split()
        out[int(os.path.basename(task))] = (name, int(fields[16]))  # Field 19: nice.
    return out


def main():
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--mdpserve", required=True, help="path to the mdpserve binary")
    parser.add_argument("--root", required=True, help="repository root")
    args = parser.parse_args()
    binary = os.path.abspath(args.mdpserve)
    root = os.path.abspath(args.root)
    api = Api(root)
    started = time.monotonic()
    servers = []
    with tempfile.TemporaryDirectory(prefix="mdpserve-api-test-") as work:
        def server(name, extra, env=None):
            s = Server(binary, work, name, extra, env)
            servers.append(s)
            return s.start()

        try:
            check_openapi_document(api, root)
            data_dir = os.path.join(work, "data")
            main_server = server("main", ["--data-dir", data_dir, "--shutdown-deadline", "0.2"])
            client = Client(api, main_server)
            resp = client.call("GET", "/v1/openapi.json", expect=200, name="0: served openapi")
            R.check("0: served /v1/openapi.json is api-schema/openapi.json byte for byte",
                    resp.body == api.raw)
            client.call("GET", "/healthz", expect=200, name="0: healthz")
            client.call("GET", "/readyz", expect=200, name="0: readyz")
            resp = client.call("GET", "/v1/models", headers={"Authorization": "Bearer any"},
                               expect=200, name="f: token off: any Authorization is ignored")
            m = {}
            scenario_a(api, client, root, m)
            scenario_d(api, main_server, m)
            scenario_g(api, main_server, m)
            after_b = scenario_b(api, main_server, m)
            scenario_c(api, main_server, m, after_b)
            code, seconds = main_server.terminate()
            R.check("c: final SIGTERM exits 0 (%.2f s)" % seconds, code == 0, str(code))

            errors_server = server("errors", ["--memory-store", "--workers", "1",
                                              "--queue-length", "1", "--body-limit", "65536"])
            scenario_e(api, errors_server, root)

            token = "tok-%016x" % random.Random(5).getrandbits(64)
            token_file = os.path.join(work, "token")
            with open(token_file, "w") as f:
                f.write(token + "\n")
            token_server = server("token", ["--memory-store", "--token-file", token_file])
            scenario_f(api, token_server, token)
            scenario_h(api, server("criteria", ["--memory-store"]))
            limit = ["--store-value-limit", "20000"]
            scenario_i(api, server("limit-memory", ["--memory-store"] + limit), root, "memory")
            scenario_i(api, server("limit-sqlite", ["--data-dir", os.path.join(work, "limited")]
                                   + limit), root, "sqlite")
            scenario_j(api, server("connections", ["--memory-store", "--http-threads", "2",
                                                   "--idle-timeout", "2",
                                                   "--body-limit", "65536"]), root, 2)
            scenario_k(api, server("large-requests", ["--memory-store", "--http-threads", "1",
                                                      "--solver-threads", "2",
                                                      "--log-level", "info"],
                                   {"GOMP_SPINCOUNT": None, "OMP_WAIT_POLICY": None}))
            scenario_openmp(server("openmp-kept", ["--memory-store", "--http-slice-us", "0"],
                                   {"GOMP_SPINCOUNT": None, "OMP_WAIT_POLICY": "passive"}))
        except Exception as e:  # noqa: BLE001 - reported as a failure, servers still stopped
            import traceback
            traceback.print_exc()
            R.check("no unexpected exception", False, repr(e))
        finally:
            for s in servers:
                s.ensure_stopped()
            if R.failed:
                for s in servers:
                    path = os.path.join(work, s.name + ".log")
                    if os.path.exists(path):
                        with open(path, "rb") as f:
                            tail = f.read()[-1500:]
                        print("--- last lines of the %s server's log:\n%s" %
                              (s.name, tail.decode("utf-8", "replace")))
    print("(%.1f s)" % (time.monotonic() - started))
    if R.failures:
        print("--- the failed checks again:")
        for line in R.failures:
            print(line)
    print("%d passed, %d failed" % (R.passed, R.failed))
    return 1 if R.failed else 0


if __name__ == "__main__":
    sys.exit(main())
