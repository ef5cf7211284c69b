#!/usr/bin/env python3
"""Seed the fuzz corpora from the repository's own demo scenarios.

Usage: python3 fuzz/seed.py   (from anywhere; writes fuzz/corpus/{expr,onnx,spec}/)

- spec: the demo campaign specs as they are;
- expr: every expression string found in them (dynamics, observations, unsafe sets, ...);
- onnx: the demo networks, plus the importer's reference cases written by
  tests/reference/onnx_cases.py when the `onnx` package is installed.
"""
import hashlib
import json
import os
import pathlib
import subprocess
import sys
import tempfile

root = pathlib.Path(__file__).resolve().parent.parent
corpus = root / "fuzz" / "corpus"


def put(target, data):
    d = corpus / target
    d.mkdir(parents=True, exist_ok=True)
    (d / hashlib.sha1(data).hexdigest()).write_bytes(data)


def strings(v):
    if isinstance(v, str):
        yield v
    elif isinstance(v, list):
        for x in v:
            yield from strings(x)
    elif isinstance(v, dict):
        for x in v.values():
            yield from strings(x)


for spec in sorted(root.glob("demo/*/spec.json")):
    raw = spec.read_bytes()
    put("spec", raw)
    for s in strings(json.loads(raw)):
        put("expr", s.encode())
for model in sorted(root.glob("demo/*/*.onnx")):
    put("onnx", model.read_bytes())
with tempfile.TemporaryDirectory() as tmp:
    r = subprocess.run([sys.executable, str(root / "tests/reference/onnx_cases.py"), tmp], capture_output=True, text=True)
    if r.returncode != 0:
        print("onnx_cases.py failed (onnx/onnxruntime missing?); only the demo networks seed onnx:\n" + r.stderr)
    for f in sorted(pathlib.Path(tmp).glob("*.onnx")):
        put("onnx", f.read_bytes())
for t in ("expr", "onnx", "spec"):
    print(t, len(os.listdir(corpus / t)), "seeds")
