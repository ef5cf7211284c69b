"""Checks Kubernetes manifests against the models of the official Kubernetes Python
client (PyPI `kubernetes`, generated from the Kubernetes OpenAPI specification).

Usage: python3 check_k8s_fields.py FILE.yaml...

For every document whose apiVersion/kind the client models, it reports
- every field name the model does not have (the API server drops or rejects them),
- every value whose type differs from the model's (str, int, bool, list, map, object),
- what the client's own validation (`from_dict`) rejects, e.g. a missing required field.
Quantities (cpu: "1") are typed `str` in the client: this check wants them quoted,
which is stricter than the API server, which also takes a bare number.
Kinds the client does not model (Kustomization) are listed as skipped.

Prints one JSON object {"errors": [...], "checked": [...], "skipped": [...]} and exits
0 when there is no error, 1 otherwise, 2 when a package is missing.
"""

import json
import re
import sys

try:
    import yaml
    import kubernetes
    import kubernetes.client as k8s
except ImportError as e:  # fail loudly: the Rust test turns this into a failure
    print(json.dumps({"missing": str(e)}))
    sys.exit(2)

# apiVersion/kind -> model class name in kubernetes.client.
MODELS = {
    ("apps/v1", "StatefulSet"): "V1StatefulSet",
    ("apps/v1", "Deployment"): "V1Deployment",
    ("v1", "Service"): "V1Service",
    ("v1", "Secret"): "V1Secret",
    ("autoscaling/v2", "HorizontalPodAutoscaler"): "V2HorizontalPodAutoscaler",
}
NOT_MODELLED = {("kustomize.config.k8s.io/v1beta1", "Kustomization")}

LIST = re.compile(r"^List\[(.*)\]$")
DICT = re.compile(r"^Dict\[str, (.*)\]$")


def walk(value, typ, path, errors):
    """Compares `value` (parsed YAML) with the client type string `typ`."""
    m = LIST.match(typ)
    if m:
        if not isinstance(value, list):
            errors.append(f"{path}: expected a list, found {type(value).__name__}")
            return
        for i, item in enumerate(value):
            walk(item, m.group(1), f"{path}[{i}]", errors)
        return
    m = DICT.match(typ)
    if m:
        if not isinstance(value, dict):
            errors.append(f"{path}: expected a map, found {type(value).__name__}")
            return
        for k, v in value.items():
            walk(v, m.group(1), f"{path}.{k}", errors)
        return
    if typ == "object":  # IntOrString and free-form fields
        return
    if typ in ("str", "bytes", "datetime", "date"):
        if not isinstance(value, str):
            errors.append(f"{path}: expected a string, found {type(value).__name__} {value!r} (quote it)")
        return
    if typ == "int":
        if isinstance(value, bool) or not isinstance(value, int):
            errors.append(f"{path}: expected an integer, found {type(value).__name__} {value!r}")
        return
    if typ == "float":
        if isinstance(value, bool) or not isinstance(value, (int, float)):
            errors.append(f"{path}: expected a number, found {type(value).__name__} {value!r}")
        return
    if typ == "bool":
        if not isinstance(value, bool):
            errors.append(f"{path}: expected true or false, found {type(value).__name__} {value!r}")
        return
    model = getattr(k8s, typ, None)
    if model is None:
        errors.append(f"{path}: the client has no type {typ}")
        return
    if not isinstance(value, dict):
        errors.append(f"{path}: expected a {typ} map, found {type(value).__name__}")
        return
    by_json = {j: a for a, j in model.attribute_map.items()}
    for k, v in value.items():
        attr = by_json.get(k)
        if attr is None:
            errors.append(f"{path}: {typ} has no field '{k}'")
            continue
        if v is None:
            continue
        walk(v, model.openapi_types[attr], f"{path}.{k}", errors)


def main(paths):
    errors, checked, skipped = [], [], []
    for p in paths:
        with open(p, encoding="utf-8") as f:
            try:
                docs = [d for d in yaml.safe_load_all(f) if d is not None]
            except yaml.YAMLError as e:
                errors.append(f"{p}: not YAML: {e}")
                continue
        for i, d in enumerate(docs):
            key = (d.get("apiVersion"), d.get("kind"))
            where = f"{p}#{i + 1} {key[1]} {d.get('metadata', {}).get('name', '')}".rstrip()
            if key in NOT_MODELLED:
                skipped.append(where)
                continue
            name = MODELS.get(key)
            if name is None:
                errors.append(f"{where}: no client model for {key[0]}/{key[1]}")
                continue
            before = len(errors)
            walk(d, name, where, errors)
            if len(errors) == before:
                try:
                    getattr(k8s, name).from_dict(d)
                except Exception as e:  # the client's own validation, e.g. a missing required field
                    errors.append(f"{where}: rejected by kubernetes.client.{name}: {e}")
            checked.append(where)
    print(json.dumps({"errors": errors, "checked": checked, "skipped": skipped,
                      "client": kubernetes.__version__}, indent=1))
    return 1 if errors else 0


if __name__ == "__main__":
    sys.exit(main(sys.argv[1:]))
