#!/usr/bin/env python3
"""Time per package of a `cargo test --workspace` run, for tests/run.sh.

Usage: stage_times.py map OUT   (reads `cargo test --no-run --message-format=json` on
stdin and writes "executable<TAB>package" lines to OUT)
       stage_times.py sum MAP   (reads the test run's output on stdin, echoes it, and
prints the seconds each package's test binaries took, from cargo's own
"finished in N s" lines, at the end)
"""
import json
import re
import sys


def write_map(out):
    with open(out, "w") as f:
        for line in sys.stdin:
            try:
                msg = json.loads(line)
            except ValueError:
                continue
            if msg.get("reason") == "compiler-artifact" and msg.get("executable") and msg.get("profile", {}).get("test"):
                f.write(f"{msg['executable']}\t{manifest_name(msg)}\n")


def manifest_name(msg):
    # package_id is "path+file:///…/worker#tessera-worker@0.1.0" (or an older form);
    # the name is between '#' and '@' when present, else the folder's name.
    pid = msg["package_id"]
    m = re.search(r"#([^@]+)@", pid)
    if m:
        return m.group(1)
    m = re.match(r"(\S+) ", pid)
    return m.group(1) if m else pid


def summarise(map_path):
    owner = dict(line.rstrip("\n").split("\t") for line in open(map_path) if "\t" in line)
    seconds, current = {}, None
    for line in sys.stdin:
        sys.stdout.write(line)
        sys.stdout.flush()
        m = re.search(r"^\s*Running .*\((.+)\)\s*$", line)
        if m:
            exe = m.group(1)
            current = next((p for e, p in owner.items() if e.endswith(exe)), exe)
            continue
        m = re.search(r"^\s*Doc-tests (\S+)", line)
        if m:
            current = m.group(1).replace("_", "-") + " (doc)"
            continue
        m = re.search(r"^test result: .*finished in ([0-9.]+)s", line)
        if m and current:
            seconds[current] = seconds.get(current, 0.0) + float(m.group(1))
    print("== test time per package (cargo's own per-binary times)")
    for pkg, s in sorted(seconds.items(), key=lambda kv: -kv[1]):
        print(f"{pkg:<32} {s:8.1f} s")


if __name__ == "__main__":
    if sys.argv[1] == "map":
        write_map(sys.argv[2])
    else:
        summarise(sys.argv[2])
