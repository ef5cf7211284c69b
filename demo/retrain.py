#!/usr/bin/env python3
"""Retrain one demo scenario's networks with another seed, into another folder.

For the follow-up benchmark (`server/examples/bench_followup.rs`): a "new version" of a
controller bank, trained exactly as `demo/train.py` trains the committed one (same
expert, sizes, epochs and spec constants, read from train.py at run time) but from a
different random seed. Writes OUT_DIR/SCENARIO/spec.json and its ONNX files; the
committed demo files are not touched.

Usage: python3 demo/retrain.py SCENARIO SEED OUT_DIR     (SCENARIO: lander, aisle or heading)
"""
import os
import sys

sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))
import train  # noqa: E402  (importing trains nothing)


def main():
    if len(sys.argv) != 4 or sys.argv[1] not in train.SCENARIOS:
        raise SystemExit(__doc__)
    name, seed, out = sys.argv[1], int(sys.argv[2]), os.path.abspath(sys.argv[3])
    cls = train.SCENARIOS[name]
    cls.seed = seed
    train.HERE = out  # run_* and write_spec write under train.HERE
    os.makedirs(os.path.join(out, name), exist_ok=True)
    train.RUNS[name]()


if __name__ == "__main__":
    main()
