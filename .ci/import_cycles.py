#!/usr/bin/env python3
"""Fails when two source files of the library import each other, directly or through others.

Each file under src/ (the library; the command-line tool in src/cli and src/main.rs are
left out) is a node. A `use` of `crate::…`, `super::…` or `self::…`, or a path written in the
code, is an edge to the file of the longest module prefix of that path. `mod x;` declarations
are not edges; `pub use x::Y` re-exports are. Prints each cycle found and exits 1 if any.
"""
import os
import re
import sys

ROOT = os.path.join(os.path.dirname(os.path.abspath(__file__)), "..", "src")


def module_of(rel):
    parts = rel[:-3].split(os.sep)
    if parts[-1] in ("mod", "lib"):
        parts = parts[:-1]
    return tuple(parts)


files = {}
for dirpath, _, names in os.walk(ROOT):
    for n in names:
        if not n.endswith(".rs"):
            continue
        rel = os.path.relpath(os.path.join(dirpath, n), ROOT)
        if rel == "main.rs" or rel.startswith("cli" + os.sep):
            continue
        files[module_of(rel)] = rel


def strip_comments(src):
    src = re.sub(r"/\*.*?\*/", "", src, flags=re.S)
    return "\n".join(line.split("//")[0] for line in src.splitlines())


def expand(tree):
    """Expands a use tree `a::{b, c::{d, e}}` into full paths."""
    tree = tree.replace(" ", "").replace("\n", "")
    depth, i = 0, 0
    for i, ch in enumerate(tree):
        if ch == "{" and depth == 0:
            head = tree[:i]
            body = tree[i + 1 : tree.rindex("}")]
            items, d, cur = [], 0, ""
            for c in body:
                if c == "," and d == 0:
                    items.append(cur)
                    cur = ""
                    continue
                d += c == "{"
                d -= c == "}"
                cur += c
            items.append(cur)
            out = []
            for it in items:
                if it:
                    out += [head + x for x in expand(it)]
            return out
    return [tree.split(" as ")[0]]


def absolute(path, here, is_mod_file):
    parts = [p for p in path.split("::") if p]
    base = list(here) if is_mod_file else list(here[:-1])
    if not parts:
        return None
    if parts[0] == "crate":
        return parts[1:]
    if parts[0] in ("super", "self"):
        cur = list(here)
        while parts and parts[0] in ("super", "self"):
            if parts[0] == "super":
                cur = cur[:-1]
            parts = parts[1:]
        return cur + parts
    # A path relative to the current module (`use child::X` in a mod.rs).
    return base + parts if is_mod_file else None


edges = {rel: set() for rel in files.values()}
for mod, rel in files.items():
    text = strip_comments(open(os.path.join(ROOT, rel), encoding="utf-8").read())
    is_mod = rel.endswith("mod.rs") or rel == "lib.rs"
    paths = []
    for m in re.finditer(r"\b(?:pub(?:\([a-z]+\))?\s+)?use\s+([^;]+);", text):
        paths += expand(m.group(1))
    paths += re.findall(r"\b(?:crate|super)(?:::[A-Za-z_][A-Za-z0-9_]*)+", text)
    for p in paths:
        full = absolute(p, mod, is_mod)
        if full is None:
            continue
        for k in range(len(full), -1, -1):
            target = files.get(tuple(full[:k]))
            if target is not None:
                if target != rel:
                    edges[rel].add(target)
                break

# Tarjan's strongly connected components.
index, low, stack, on, sccs, counter = {}, {}, [], set(), [], [0]


def visit(v):
    index[v] = low[v] = counter[0]
    counter[0] += 1
    stack.append(v)
    on.add(v)
    for w in edges[v]:
        if w not in index:
            visit(w)
            low[v] = min(low[v], low[w])
        elif w in on:
            low[v] = min(low[v], index[w])
    if low[v] == index[v]:
        comp = []
        while True:
            w = stack.pop()
            on.discard(w)
            comp.append(w)
            if w == v:
                break
        if len(comp) > 1:
            sccs.append(sorted(comp))


sys.setrecursionlimit(10000)
for v in sorted(edges):
    if v not in index:
        visit(v)
for c in sccs:
    print("import cycle between: " + ", ".join("src/" + f for f in c))
print(f"{len(files)} files, {sum(len(e) for e in edges.values())} imports, {len(sccs)} cycles")
sys.exit(1 if sccs else 0)
