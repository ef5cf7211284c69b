#!/usr/bin/env python3
"""Release gate for a training pipeline: verify a controller with a Tessera server and
fail the pipeline step when too little of the envelope is proven safe.

Steps: upload every network the spec references (POST /api/v1/models, raw ONNX body,
answer {"sha256": ...}, checked against the local hash), rewrite the spec's networks to
`sha256:HEX`, create a campaign (POST /api/v1/campaigns, the spec JSON as body), poll
GET /api/v1/campaigns/{id}/coverage until the campaign is finished, then compare the
proven-safe fraction of the envelope with --min-safe.

With --follow-up ID the campaign starts from the cells of the finished campaign ID (the
previous version's; same envelope and split states). With --no-new-counterexample (earlier
name: --no-new-unsafe) the gate also reads GET /api/v1/campaigns/{id}/changes and fails
when any volume proven safe in the campaign followed up now lies in a cell holding a
checked counterexample (an exact fraction, compared as "0/1").

Exit status: 0 pass, 1 proven-safe fraction below --min-safe, new counterexample volume
with --no-new-counterexample (or the campaign failed), 2 usage, input, HTTP or timeout error.

With its verdict the gate prints the server's caution (the coverage answer's `caution`):
a pass is engineering evidence under the spec's model assumptions, not a certification;
release decisions for a real system follow the applicable safety standards and the
responsible certification authority.

Stdlib only (urllib). Usage:
  python3 deploy/pipeline/gate.py --server http://127.0.0.1:8080 --spec demo/lander/spec.json \
      --min-safe 0.9 [--follow-up PREVIOUS_ID --no-new-counterexample] [--token TOKEN | env TESSERA_TOKEN]
"""

# --- Wire format: every field and path name of the server API used here, in one place. ---
MODELS_PATH = "/api/v1/models"
CAMPAIGNS_PATH = "/api/v1/campaigns"
COVERAGE_PATH = "/api/v1/campaigns/{id}/coverage"
MODEL_SHA_FIELD = "sha256"  # in the answer to an upload
MODEL_REF_PREFIX = "sha256:"  # how a spec names a stored model
CAMPAIGN_ID_FIELD = "id"  # in the answer to a campaign creation
STATE_FIELD = "state"  # in the coverage answer
FINISHED_STATES = {"done"}
FAILED_STATES = {"cancelled"}
FRACTIONS_FIELD = "statuses"  # in the coverage answer: {"safe": {"fraction": x, ...}, ...}
FRACTION_FIELD = "fraction"  # inside each status
SAFE_FIELD = "safe"
CAUTION_FIELD = "caution"  # in the coverage answer: the text to print with the verdict
TOKEN_ENV = "TESSERA_TOKEN"
FOLLOW_UP_PARAM = "follow_up"  # query parameter of the campaign creation
CHANGES_PATH = "/api/v1/campaigns/{id}/changes"
SUMMARY_FIELD = "summary"  # in the changes answer
SAFE_TO_COUNTEREXAMPLE_FIELD = "safe_to_counterexample"  # inside the summary: {"reduced": "p/q", "fraction": x, ...}
EXACT_FIELD = "reduced"
ZERO_FRACTION = "0/1"
# ----------------------------------------------------------------------------------------

import argparse
import hashlib
import json
import os
import sys
import time
import urllib.error
import urllib.parse
import urllib.request

EXIT_PASS, EXIT_BELOW, EXIT_ERROR = 0, 1, 2


class GateError(Exception):
    """A problem that stops the gate before a verdict (exit status 2)."""


def request(server, method, path, token, body=None, content_type=None, timeout=60.0):
    """One HTTP exchange; returns the decoded JSON answer or raises GateError naming the
    method, path, status and the server's message."""
    url = server.rstrip("/") + path
    headers = {"Accept": "application/json"}
    if token:
        headers["Authorization"] = f"Bearer {token}"
    if content_type:
        headers["Content-Type"] = content_type
    req = urllib.request.Request(url, data=body, method=method, headers=headers)
    try:
        with urllib.request.urlopen(req, timeout=timeout) as resp:
            raw = resp.read()
    except urllib.error.HTTPError as e:
        detail = e.read().decode("utf-8", "replace")[:2000]
        raise GateError(f"{method} {path}: HTTP {e.code}: {detail}") from None
    except (urllib.error.URLError, OSError) as e:
        raise GateError(f"{method} {path}: cannot reach {server}: {e}") from None
    try:
        return json.loads(raw.decode("utf-8"))
    except (UnicodeDecodeError, json.JSONDecodeError):
        raise GateError(f"{method} {path}: the answer is not JSON: {raw[:200]!r}") from None


def field(obj, name, where):
    if not isinstance(obj, dict) or name not in obj:
        raise GateError(f"{where}: the answer has no field '{name}': {json.dumps(obj)[:500]}")
    return obj[name]


def upload_models(server, token, spec, spec_dir):
    """Upload each file network of the spec; returns the spec with `sha256:HEX` refs."""
    nets = spec.get("controller", {}).get("networks")
    if not isinstance(nets, list) or not nets:
        raise GateError("spec: controller.networks must be a non-empty list")
    refs = []
    for i, ref in enumerate(nets):
        if not isinstance(ref, str):
            raise GateError(f"spec: controller.networks[{i}] is not a string")
        if ref.startswith(MODEL_REF_PREFIX):
            refs.append(ref)  # already stored
            continue
        path = os.path.join(spec_dir, ref)
        try:
            with open(path, "rb") as f:
                data = f.read()
        except OSError as e:
            raise GateError(f"spec: controller.networks[{i}]: cannot read {path}: {e}") from None
        local = hashlib.sha256(data).hexdigest()
        answer = request(server, "POST", MODELS_PATH, token, data, "application/octet-stream")
        remote = field(answer, MODEL_SHA_FIELD, f"POST {MODELS_PATH}")
        if remote != local:
            raise GateError(f"upload of {ref}: the server stored sha256 {remote}, the file has {local}")
        print(f"uploaded {ref}: {MODEL_REF_PREFIX}{local}")
        refs.append(MODEL_REF_PREFIX + local)
    out = json.loads(json.dumps(spec))
    out["controller"]["networks"] = refs
    return out


def wait_finished(server, token, campaign_id, poll_s, timeout_s):
    path = COVERAGE_PATH.format(id=campaign_id)
    deadline = time.monotonic() + timeout_s
    last = None
    while True:
        cov = request(server, "GET", path, token)
        state = field(cov, STATE_FIELD, f"GET {path}")
        if state != last:
            print(f"campaign {campaign_id}: {state}")
            last = state
        if state in FINISHED_STATES or state in FAILED_STATES:
            return state, cov
        if time.monotonic() > deadline:
            raise GateError(f"campaign {campaign_id} not finished after {timeout_s:g} s (state '{state}')")
        time.sleep(poll_s)


def main(argv=None):
    ap = argparse.ArgumentParser(description="Fail a pipeline step when too little of the envelope is proven safe.")
    ap.add_argument("--server", required=True, help="base URL of the Tessera server")
    ap.add_argument("--spec", required=True, help="campaign spec (JSON); network paths relative to it")
    ap.add_argument("--min-safe", type=float, required=True, help="least proven-safe fraction to pass, in [0, 1]")
    ap.add_argument("--follow-up", metavar="CAMPAIGN_ID", help="start from the cells of this finished campaign")
    ap.add_argument("--no-new-counterexample", "--no-new-unsafe", dest="no_new_counterexample", action="store_true",
                    help="also fail when volume proven safe in the campaign followed up now lies in a cell "
                         "holding a checked counterexample")
    ap.add_argument("--token", default=os.environ.get(TOKEN_ENV), help=f"API token (default: ${TOKEN_ENV})")
    ap.add_argument("--poll-s", type=float, default=5.0, help="seconds between coverage polls")
    ap.add_argument("--timeout-s", type=float, default=3600.0, help="give up after this many seconds")
    a = ap.parse_args(argv)
    if not 0.0 <= a.min_safe <= 1.0:
        print("error: --min-safe must be in [0, 1]", file=sys.stderr)
        return EXIT_ERROR
    if a.no_new_counterexample and not a.follow_up:
        print("error: --no-new-counterexample needs --follow-up (the campaign to compare with)", file=sys.stderr)
        return EXIT_ERROR
    try:
        with open(a.spec) as f:
            spec = json.load(f)
    except (OSError, json.JSONDecodeError) as e:
        print(f"error: cannot read the spec {a.spec}: {e}", file=sys.stderr)
        return EXIT_ERROR
    try:
        stored = upload_models(a.server, a.token, spec, os.path.dirname(os.path.abspath(a.spec)))
        create_path = CAMPAIGNS_PATH
        if a.follow_up:
            create_path += "?" + urllib.parse.urlencode({FOLLOW_UP_PARAM: a.follow_up})
        created = request(a.server, "POST", create_path, a.token,
                          json.dumps(stored).encode("utf-8"), "application/json")
        cid = field(created, CAMPAIGN_ID_FIELD, f"POST {CAMPAIGNS_PATH}")
        print(f"campaign {cid} created")
        state, cov = wait_finished(a.server, a.token, cid, a.poll_s, a.timeout_s)
        if state in FAILED_STATES:
            print(f"FAIL: campaign {cid} ended in state '{state}'")
            return EXIT_BELOW
        statuses = field(cov, FRACTIONS_FIELD, "coverage")
        if not isinstance(statuses, dict):
            raise GateError(f"coverage.{FRACTIONS_FIELD} is not an object")
        fractions = {k: v.get(FRACTION_FIELD) for k, v in statuses.items() if isinstance(v, dict)}
        safe = field(fractions, SAFE_FIELD, f"coverage.{FRACTIONS_FIELD}")
        if not isinstance(safe, (int, float)) or isinstance(safe, bool) or not 0.0 <= safe <= 1.0:
            raise GateError(f"coverage.{FRACTIONS_FIELD}.{SAFE_FIELD}.{FRACTION_FIELD} is not a fraction: {safe!r}")
        caution = field(cov, CAUTION_FIELD, "coverage")
        new_cx = None
        if a.no_new_counterexample:
            path = CHANGES_PATH.format(id=cid)
            changes = request(a.server, "GET", path, a.token)
            s2c = field(field(changes, SUMMARY_FIELD, f"GET {path}"), SAFE_TO_COUNTEREXAMPLE_FIELD,
                        f"GET {path} {SUMMARY_FIELD}")
            new_cx = field(s2c, EXACT_FIELD, f"GET {path} {SUMMARY_FIELD}.{SAFE_TO_COUNTEREXAMPLE_FIELD}")
    except GateError as e:
        print(f"error: {e}", file=sys.stderr)
        return EXIT_ERROR
    others = ", ".join(f"{k} {v:.4f}" for k, v in fractions.items() if k != SAFE_FIELD and isinstance(v, (int, float)))
    print(f"proven safe {safe:.4f} of the envelope (required {a.min_safe:.4f}){'; ' + others if others else ''}")
    print(caution)
    if safe < a.min_safe:
        print("FAIL: proven-safe fraction below the required minimum")
        return EXIT_BELOW
    if new_cx is not None:
        if new_cx != ZERO_FRACTION:
            print(f"FAIL: {new_cx} of the envelope was proven safe in campaign {a.follow_up} "
                  "and lies in cells with a counterexample now")
            return EXIT_BELOW
        print(f"no volume proven safe in campaign {a.follow_up} lies in a cell with a counterexample now")
    print("PASS")
    return EXIT_PASS


if __name__ == "__main__":
    sys.exit(main())
