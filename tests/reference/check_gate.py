#!/usr/bin/env python3
"""Exercise deploy/pipeline/gate.py against a stand-in HTTP server on loopback.

The stand-in speaks the wire format named at the top of gate.py (it imports those names,
so a renamed field is renamed here too): it stores uploaded models under their SHA-256
(hashlib, FIPS 180-4), records the campaign spec it is given, answers the coverage poll
with a running state twice and then a finished state with a chosen safe fraction and a
caution text.

Checks (each exits non-zero with a message when it fails):
  1. a pass: safe 0.75 >= --min-safe 0.7 -> exit 0; the campaign spec received has every
     network rewritten to sha256:HEX of the exact bytes uploaded, the rest unchanged;
  2. below the threshold: --min-safe 0.8 -> exit 1;
  3. a wrong bearer token (HTTP 401) -> exit 2;
  4. a server that reports a different hash for an upload -> exit 2;
  5. a campaign that ends cancelled -> exit 1;
  6. --follow-up c5 --no-new-counterexample with no safe volume now in counterexample
     cells -> exit 0, and the campaign was created with the follow_up query parameter;
  7. the same (under the flag's earlier name, --no-new-unsafe) with 1/8 of the envelope
     turned from safe to counterexample -> exit 1;
  8. the verdict is printed with the server's caution, verbatim.

Usage: python3 tests/reference/check_gate.py REPO_ROOT
"""

import hashlib
import http.server
import json
import os
import subprocess
import sys
import threading
import urllib.parse


def fail(msg):
    sys.stderr.write(f"check_gate: FAIL: {msg}\n")
    sys.exit(1)


root = os.path.abspath(sys.argv[1])
sys.path.insert(0, os.path.join(root, "deploy", "pipeline"))
import gate as G  # noqa: E402  (wire-format names)

TOKEN = "test-token"
CAUTION = "stand-in caution: evidence under the stated model assumptions, not a certification"
STATE = {"safe": 0.75, "final": "done", "lie_about_hash": False, "models": {}, "campaigns": [], "polls": 0,
         "queries": [], "safe_to_counterexample": "0/1"}


class Handler(http.server.BaseHTTPRequestHandler):
    def log_message(self, *args):
        pass

    def reply(self, code, obj):
        body = json.dumps(obj).encode()
        self.send_response(code)
        self.send_header("Content-Type", "application/json")
        self.send_header("Content-Length", str(len(body)))
        self.end_headers()
        self.wfile.write(body)

    def authorized(self):
        if self.headers.get("Authorization") != f"Bearer {TOKEN}":
            self.reply(401, {"error": "unauthorized"})
            return False
        return True

    def do_POST(self):
        if not self.authorized():
            return
        data = self.rfile.read(int(self.headers.get("Content-Length", "0")))
        if self.path == G.MODELS_PATH:
            h = hashlib.sha256(data).hexdigest()
            STATE["models"][h] = data
            self.reply(201, {G.MODEL_SHA_FIELD: ("0" * 64) if STATE["lie_about_hash"] else h})
        elif urllib.parse.urlsplit(self.path).path == G.CAMPAIGNS_PATH:
            STATE["queries"].append(urllib.parse.parse_qs(urllib.parse.urlsplit(self.path).query))
            STATE["campaigns"].append(json.loads(data))
            STATE["polls"] = 0
            self.reply(201, {G.CAMPAIGN_ID_FIELD: f"c{len(STATE['campaigns'])}"})
        else:
            self.reply(404, {"error": "no route"})

    def do_GET(self):
        if not self.authorized():
            return
        cid = f"c{len(STATE['campaigns'])}"
        if self.path == G.CHANGES_PATH.format(id=cid):
            return self.reply(200, {G.SUMMARY_FIELD: {G.SAFE_TO_COUNTEREXAMPLE_FIELD: {G.EXACT_FIELD: STATE["safe_to_counterexample"]}}})
        if self.path != G.COVERAGE_PATH.format(id=cid):
            return self.reply(404, {"error": "no route"})
        STATE["polls"] += 1
        if STATE["polls"] < 3:
            return self.reply(200, {G.STATE_FIELD: "running", G.FRACTIONS_FIELD: {G.SAFE_FIELD: {G.FRACTION_FIELD: 0.1}},
                                    G.CAUTION_FIELD: CAUTION})
        fr = {G.SAFE_FIELD: STATE["safe"], "counterexample": 0.05, "unresolved": 1.0 - STATE["safe"] - 0.05}
        self.reply(200, {G.STATE_FIELD: STATE["final"], G.FRACTIONS_FIELD: {k: {G.FRACTION_FIELD: v} for k, v in fr.items()},
                         G.CAUTION_FIELD: CAUTION})


server = http.server.ThreadingHTTPServer(("127.0.0.1", 0), Handler)
threading.Thread(target=server.serve_forever, daemon=True).start()
url = f"http://127.0.0.1:{server.server_address[1]}"
spec_path = os.path.join(root, "demo", "aisle", "spec.json")


def run(min_safe, token=TOKEN, extra=()):
    r = subprocess.run(
        [sys.executable, os.path.join(root, "deploy", "pipeline", "gate.py"), "--server", url, "--spec", spec_path,
         "--min-safe", str(min_safe), "--token", token, "--poll-s", "0.01", "--timeout-s", "20", *extra],
        capture_output=True, text=True, timeout=60)
    return r.returncode, r.stdout + r.stderr


code, out = run(0.7)
if code != 0:
    fail(f"expected a pass (exit 0), got {code}:\n{out}")
if CAUTION + "\n" not in out:
    fail(f"the verdict was printed without the server's caution:\n{out}")
with open(spec_path) as f:
    original = json.load(f)
sent = STATE["campaigns"][-1]
for i, ref in enumerate(original["controller"]["networks"]):
    with open(os.path.join(os.path.dirname(spec_path), ref), "rb") as f:
        digest = hashlib.sha256(f.read()).hexdigest()
    if sent["controller"]["networks"][i] != G.MODEL_REF_PREFIX + digest or digest not in STATE["models"]:
        fail(f"network {i} ({ref}) was not uploaded and rewritten to its sha256")
sent["controller"]["networks"] = original["controller"]["networks"]
if sent != original:
    fail("the campaign spec differs from the file in more than the network references")

code, out = run(0.8)
if code != 1:
    fail(f"expected exit 1 below the threshold, got {code}:\n{out}")

code, out = run(0.1, token="wrong")
if code != 2 or "401" not in out:
    fail(f"expected exit 2 naming HTTP 401 for a wrong token, got {code}:\n{out}")

STATE["lie_about_hash"] = True
code, out = run(0.1)
if code != 2 or "sha256" not in out:
    fail(f"expected exit 2 when the server reports another hash, got {code}:\n{out}")
STATE["lie_about_hash"] = False

STATE["final"] = "cancelled"
code, out = run(0.1)
if code != 1:
    fail(f"expected exit 1 for a failed campaign, got {code}:\n{out}")

STATE["final"] = "done"
code, out = run(0.1, extra=["--follow-up", "c5", "--no-new-counterexample"])
if code != 0:
    fail(f"expected a pass with no new counterexample volume, got {code}:\n{out}")
if STATE["queries"][-1].get(G.FOLLOW_UP_PARAM) != ["c5"]:
    fail(f"the campaign was not created as a follow-up of c5: {STATE['queries'][-1]}")

STATE["safe_to_counterexample"] = "1/8"
code, out = run(0.1, extra=["--follow-up", "c6", "--no-new-unsafe"])
if code != 1 or "1/8" not in out:
    fail(f"expected exit 1 naming 1/8 of new counterexample volume, got {code}:\n{out}")
if CAUTION + "\n" not in out:
    fail(f"the failing verdict was printed without the server's caution:\n{out}")

server.shutdown()
print("check_gate: 8 checks passed")
