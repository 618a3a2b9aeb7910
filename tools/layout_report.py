"""The shape of the code: modules per folder, longest modules, import levels and loops.

Reads the source of the ``ranktide`` package (``stream/``, and ``kernels/`` as
``ranktide.kernels``) with :mod:`ast`, without importing it, and builds the graph
of module-level imports between project modules. Prints a table and writes JSON
with ``--out DIR``.

* level: 1 for a module that imports no project module, else one more than the
  highest level among the modules it imports (modules in a loop share one level);
* loops: strongly connected groups of more than one module;
* imports inside functions: project imports not at module level (each should
  carry a comment saying why: an optional dependency such as dask).

Usage::

    .venv/bin/python tools/layout_report.py [--out DIR]
    # an older commit, whose packages were installed as `stream` and `kernels`:
    git worktree add /tmp/old 8a29293
    .venv/bin/python tools/layout_report.py --tree /tmp/old --package stream=stream \
        --package kernels=kernels
"""

from __future__ import annotations

import argparse
import ast
import json
import sys
from collections import defaultdict
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
FOLDERS = {"ranktide": ROOT / "stream", "ranktide.kernels": ROOT / "kernels"}


def module_files(folders: dict[str, Path] | None = None) -> dict[str, Path]:
    """Map each project module name to its file."""
    out: dict[str, Path] = {}
    for prefix, folder in (folders or FOLDERS).items():
        for path in sorted(folder.rglob("*.py")):
            rel = path.relative_to(folder).with_suffix("")
            parts = [p for p in rel.parts if p != "__init__"]
            out[".".join([prefix, *parts])] = path
    return out


def _resolve(node: ast.ImportFrom, name: str, is_pkg: bool) -> str:
    if not node.level:
        return node.module or ""
    base = name.split(".") if is_pkg else name.split(".")[:-1]
    base = base[: len(base) - (node.level - 1)]
    return ".".join(base + ([node.module] if node.module else []))


def imports_of(name: str, path: Path, known: set[str],
               include_inner: bool = False) -> tuple[set[str], list[str]]:
    """(modules imported at module level — and inside functions with ``include_inner`` —,
    descriptions of imports inside functions)."""
    tree = ast.parse(path.read_text(), filename=str(path))
    top: set[str] = set()
    inner: list[str] = []
    is_pkg = path.name == "__init__.py"

    def targets(node: ast.AST) -> list[str]:
        found = []
        if isinstance(node, ast.Import):
            found = [a.name for a in node.names]
        elif isinstance(node, ast.ImportFrom):
            mod = _resolve(node, name, is_pkg)
            found = [f"{mod}.{a.name}" if f"{mod}.{a.name}" in known else mod for a in node.names]
        return [f for f in found if f in known]

    for node in tree.body:
        if isinstance(node, (ast.Import, ast.ImportFrom)):
            top.update(targets(node))
    for node in ast.walk(tree):
        if isinstance(node, (ast.FunctionDef, ast.AsyncFunctionDef)):
            for sub in ast.walk(node):
                for t in targets(sub):
                    inner.append(f"{path.name}:{sub.lineno} -> {t}")
                    if include_inner:
                        top.add(t)
    top.discard(name)
    return top, inner


def strongly_connected(graph: dict[str, set[str]]) -> list[list[str]]:
    """Tarjan's algorithm (iterative); groups of more than one node."""
    index: dict[str, int] = {}
    low: dict[str, int] = {}
    stack: list[str] = []
    on: set[str] = set()
    groups: list[list[str]] = []
    counter = 0
    for root in graph:
        if root in index:
            continue
        work = [(root, iter(sorted(graph[root])))]
        index[root] = low[root] = counter
        counter += 1
        stack.append(root)
        on.add(root)
        while work:
            v, it = work[-1]
            advanced = False
            for w in it:
                if w not in index:
                    index[w] = low[w] = counter
                    counter += 1
                    stack.append(w)
                    on.add(w)
                    work.append((w, iter(sorted(graph[w]))))
                    advanced = True
                    break
                if w in on:
                    low[v] = min(low[v], index[w])
            if advanced:
                continue
            work.pop()
            if work:
                low[work[-1][0]] = min(low[work[-1][0]], low[v])
            if low[v] == index[v]:
                group = []
                while True:
                    w = stack.pop()
                    on.discard(w)
                    group.append(w)
                    if w == v:
                        break
                if len(group) > 1:
                    groups.append(sorted(group))
    return groups


def levels(graph: dict[str, set[str]], groups: list[list[str]]) -> dict[str, int]:
    """Import level of each module (a loop counts as one node)."""
    rep = {m: m for m in graph}
    for g in groups:
        for m in g:
            rep[m] = g[0]
    memo: dict[str, int] = {}

    def level(m: str, seen: frozenset[str]) -> int:
        r = rep[m]
        if r in memo:
            return memo[r]
        members = [x for x in graph if rep[x] == r]
        deps = {rep[d] for x in members for d in graph[x]} - {r}
        val = 1 + max((level(d, seen | {r}) for d in deps if d not in seen), default=0)
        memo[r] = val
        return val

    sys.setrecursionlimit(10000)
    return {m: level(m, frozenset()) for m in graph}


def report(folders: dict[str, Path] | None = None, root: Path = ROOT,
           include_inner: bool = False) -> dict:
    """The figures of the module docstring for the packages in ``folders`` (name -> folder);
    ``include_inner`` counts imports inside functions as edges too (loops they hide show)."""
    files = module_files(folders)
    known = set(files)
    graph: dict[str, set[str]] = {}
    inner: list[str] = []
    for name, path in files.items():
        graph[name], found = imports_of(name, path, known, include_inner)
        inner.extend(found)
    groups = strongly_connected(graph)
    lev = levels(graph, groups)
    per_folder: dict[str, int] = defaultdict(int)
    lines = {}
    for path in files.values():
        per_folder[str(path.parent.relative_to(root))] += 1
        lines[str(path.relative_to(root))] = sum(1 for _ in path.open())
    longest = sorted(lines.items(), key=lambda kv: -kv[1])[:5]
    return {
        "modules": len(files),
        "modules_per_folder": dict(sorted(per_folder.items())),
        "longest_modules": dict(longest),
        "import_levels": max(lev.values()),
        "loops": groups,
        "imports_inside_functions": inner,
        "level_of": dict(sorted(lev.items(), key=lambda kv: (-kv[1], kv[0]))),
    }


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--out", type=Path, help="write layout.json into this directory")
    ap.add_argument("--tree", type=Path, default=ROOT,
                    help="another checkout (e.g. an older commit's `git worktree`)")
    ap.add_argument("--package", action="append", default=[], metavar="NAME=FOLDER",
                    help="import name and folder of a package in --tree (repeatable; default "
                    "ranktide=stream and ranktide.kernels=kernels)")
    ap.add_argument("--all-imports", action="store_true",
                    help="count imports inside functions as edges too")
    args = ap.parse_args(argv)
    pairs = [p.split("=", 1) for p in args.package] or [["ranktide", "stream"],
                                                       ["ranktide.kernels", "kernels"]]
    rep = report({name: args.tree / folder for name, folder in pairs}, args.tree.resolve(),
                 args.all_imports)
    print(f"modules          {rep['modules']}")
    print(f"import levels    {rep['import_levels']}")
    print(f"loops            {len(rep['loops'])} {rep['loops'] or ''}")
    print(f"imports inside functions  {len(rep['imports_inside_functions'])}")
    for item in rep["imports_inside_functions"][:20]:
        print(f"  {item}")
    if len(rep["imports_inside_functions"]) > 20:
        print(f"  ... {len(rep['imports_inside_functions']) - 20} more in the JSON")
    print("modules per folder")
    for folder, n in rep["modules_per_folder"].items():
        print(f"  {folder:24s} {n:3d}")
    print("longest modules")
    for path, n in rep["longest_modules"].items():
        print(f"  {path:40s} {n:5d} lines")
    if args.out:
        args.out.mkdir(parents=True, exist_ok=True)
        (args.out / "layout.json").write_text(json.dumps(rep, indent=1) + "\n")
    return 0


if __name__ == "__main__":
    sys.exit(main())
