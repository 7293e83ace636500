#!/usr/bin/env python3
"""Fails when a locked dependency declares a minimum Rust version above the crate's own.

Our own code is checked against `rust-version` by clippy's `incompatible_msrv` lint; this
covers the dependencies, from the `rust_version` that `cargo metadata` reports for each.
"""
import json
import subprocess
import sys


def parse(v):
    return tuple(int(x) for x in (v.split(".") + ["0", "0"])[:3])


meta = json.loads(
    subprocess.check_output(["cargo", "metadata", "--format-version", "1", "--locked"])
)
ours = next(p for p in meta["packages"] if p["name"] == "neural-sde")
msrv = parse(ours["rust_version"])
resolved = {n["id"] for n in meta["resolve"]["nodes"]}
bad = [
    f'{p["name"]} {p["version"]} needs Rust {p["rust_version"]}'
    for p in meta["packages"]
    if p["id"] in resolved and p.get("rust_version") and parse(p["rust_version"]) > msrv
]
for line in bad:
    print("above the declared minimum Rust version " + ours["rust_version"] + ": " + line)
print(f'{len(resolved)} packages checked against rust-version {ours["rust_version"]}')
sys.exit(1 if bad else 0)
