"""The package's house: no module imports another that imports it back (directly, through others, or
inside a function), and the one reader of study files works in a fresh process (common practice: a
layered package, each layer importing only those below it)."""

import ast
import subprocess
import sys
from collections import defaultdict
from pathlib import Path

ROOT = Path(__file__).parent.parent
PACKAGE = ROOT / "beyondmf"


def _modules() -> dict[str, Path]:
    out = {}
    for p in PACKAGE.rglob("*.py"):
        parts = p.relative_to(ROOT).with_suffix("").parts
        name = ".".join(parts[:-1] if parts[-1] == "__init__" else parts)
        out[name] = p
    return out


def _imports(mods: dict[str, Path]) -> dict[str, set[str]]:
    """module → the package modules it imports anywhere in its text. ``from pkg import sub`` counts as
    importing the submodule, not the package's own __init__."""
    graph = defaultdict(set)
    for name, p in mods.items():
        pkg = name if p.name == "__init__.py" else name.rsplit(".", 1)[0]
        for node in ast.walk(ast.parse(p.read_text(encoding="utf-8"))):
            targets = []
            if isinstance(node, ast.ImportFrom):
                if node.level:
                    base = pkg.split(".")[: len(pkg.split(".")) - node.level + 1]
                    mod = ".".join(base + ([node.module] if node.module else []))
                else:
                    mod = node.module or ""
                subs = [f"{mod}.{a.name}" for a in node.names if f"{mod}.{a.name}" in mods]
                rest = [a for a in node.names if f"{mod}.{a.name}" not in mods]
                targets = subs + ([mod] if rest and mod in mods else [])
            elif isinstance(node, ast.Import):
                targets = [a.name for a in node.names if a.name in mods]
            graph[name].update(t for t in targets if t != name)
    return graph


def _cycles(graph: dict[str, set[str]]) -> list[list[str]]:
    """Strongly connected components of more than one module (Tarjan)."""
    index, low, stack, on, out, counter = {}, {}, [], set(), [], [0]

    def visit(v):
        index[v] = low[v] = counter[0]
        counter[0] += 1
        stack.append(v)
        on.add(v)
        for w in graph.get(v, ()):
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
                out.append(sorted(comp))

    for v in list(graph):
        if v not in index:
            visit(v)
    return out


def test_the_package_has_no_import_loops():
    mods = _modules()
    graph = _imports(mods)
    assert len(mods) > 40 and sum(len(v) for v in graph.values()) > 100  # the scan sees the package
    assert _cycles(graph) == []


def test_the_cycle_finder_finds_a_loop():
    assert _cycles({"a": {"b"}, "b": {"c"}, "c": {"a"}, "d": {"a"}}) == [["a", "b", "c"]]


def test_the_one_study_reader_works_in_a_fresh_process():
    code = ("import sys, beyondmf.study as s; from pathlib import Path\n"
            "for p in sorted(Path(sys.argv[1]).glob('*.toml')):\n"
            "    s.read_study(p, quick=True)\n"
            "import beyondmf, beyondmf.sweep\n"
            "assert beyondmf.read_study is s.read_study is beyondmf.sweep.read_study\n"
            "print('ok')\n")
    done = subprocess.run([sys.executable, "-c", code, str(ROOT / "studies")], capture_output=True, text=True,
                          timeout=300)
    assert done.returncode == 0, done.stderr
    assert done.stdout.strip() == "ok"
