"""The import rules of the layout (DEVELOPERS.md, "Map"), read from the source.

Every ``import`` and ``from ... import`` of every module under ``recursive/`` and ``daemon/``,
at module level or inside a function, is an edge of the project's import graph. The test fails
on an edge the rules forbid and on any circle.
"""

from __future__ import annotations

import ast
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
PACKAGES = ("recursive", "daemon")

# (importer prefix, imported prefix, why it is forbidden)
FORBIDDEN = [
    ("recursive", "daemon", "the numerical core knows nothing of the service"),
    ("daemon.runtime", "daemon.workbench", "the service never imports the workbench"),
    ("daemon.runtime", "daemon.bridges", "bridges are processes of their own"),
    ("daemon.config", "daemon.runtime", "config is shared: it imports no program"),
    ("daemon.config", "daemon.workbench", "config is shared: it imports no program"),
    ("daemon.config", "daemon.bridges", "config is shared: it imports no program"),
    ("daemon.bridges", "daemon.workbench", "bridges run in the plant, not on a laptop"),
    ("daemon.endpoints", "daemon", "a leaf module"),
    ("daemon.sharding", "daemon", "a leaf module"),
    ("daemon.exitcodes", "daemon", "a leaf module"),
]


def modules() -> dict[str, Path]:
    out = {}
    for pkg in PACKAGES:
        for path in sorted((ROOT / pkg).rglob("*.py")):
            parts = list(path.relative_to(ROOT).with_suffix("").parts)
            if parts[-1] == "__init__":
                parts = parts[:-1]
            out[".".join(parts)] = path
    return out


def imports(name: str, path: Path, known: dict) -> set[str]:
    """The project modules ``name`` imports (a ``from pkg import mod`` names the module)."""
    tree = ast.parse(path.read_text(encoding="utf-8"), str(path))
    is_pkg = path.name == "__init__.py"
    out = set()
    for node in ast.walk(tree):
        if isinstance(node, ast.Import):
            targets = [a.name for a in node.names]
        elif isinstance(node, ast.ImportFrom):
            if node.level:
                base = name.split(".")
                base = base[:len(base) - node.level + (1 if is_pkg else 0)]
                mod = ".".join(base + ([node.module] if node.module else []))
            else:
                mod = node.module or ""
            # a C extension of a package (recursive._kernel) is no edge to the package
            targets = [f"{mod}.{a.name}" if f"{mod}.{a.name}" in known else mod
                       for a in node.names
                       if not (ROOT / mod.replace(".", "/") / f"{a.name}.c").exists()]
        else:
            continue
        for t in targets:
            while t and t not in known:
                t = t.rpartition(".")[0]  # a name inside a module: the module
            if t and t != name:
                out.add(t)
    return out


def graph() -> dict[str, set[str]]:
    known = modules()
    return {name: imports(name, path, known) for name, path in known.items()}


def _under(name: str, prefix: str) -> bool:
    return name == prefix or name.startswith(prefix + ".")


def test_no_forbidden_import():
    bad = []
    for src, targets in graph().items():
        for dst in targets:
            for a, b, why in FORBIDDEN:
                if _under(src, a) and _under(dst, b) and not (a == b or _under(dst, a)):
                    bad.append(f"{src} -> {dst}: {why}")
    assert not bad, "\n".join(bad)


def test_nothing_imports_the_cli():
    users = [src for src, targets in graph().items() if "daemon.cli" in targets]
    assert users == [], "daemon.cli is the entry point; it imports the programs, not the reverse"


def cycles(g: dict[str, set[str]]) -> list[list[str]]:
    """Strongly connected components with more than one module (Tarjan, iterative)."""
    index, low, on, stack, out = {}, {}, set(), [], []
    counter = [0]
    for root in g:
        if root in index:
            continue
        work = [(root, iter(sorted(g[root])))]
        index[root] = low[root] = counter[0]
        counter[0] += 1
        stack.append(root)
        on.add(root)
        while work:
            v, it = work[-1]
            w = next(it, None)
            if w is None:
                work.pop()
                if work:
                    low[work[-1][0]] = min(low[work[-1][0]], low[v])
                if low[v] == index[v]:
                    comp = []
                    while True:
                        x = stack.pop()
                        on.discard(x)
                        comp.append(x)
                        if x == v:
                            break
                    if len(comp) > 1:
                        out.append(sorted(comp))
                continue
            if w not in g:
                continue
            if w not in index:
                index[w] = low[w] = counter[0]
                counter[0] += 1
                stack.append(w)
                on.add(w)
                work.append((w, iter(sorted(g[w]))))
            elif w in on:
                low[v] = min(low[v], index[w])
    return out


def test_no_import_circle():
    found = cycles(graph())
    assert not found, "import circles: " + "; ".join(" <-> ".join(c) for c in found)


def test_the_checks_catch_what_they_should():
    """The rules and the circle search on a small made-up graph (so they cannot pass vacuously)."""
    assert cycles({"a": {"b"}, "b": {"c"}, "c": {"a"}, "d": {"a"}}) == [["a", "b", "c"]]
    assert cycles({"a": {"b"}, "b": set()}) == []
    g = graph()
    assert "daemon.runtime.wire" in g["daemon.runtime.service"]
    assert "recursive.posterior" in g["recursive"]
    assert len(g) > 40


def test_every_package_is_installed():
    """pyproject's package list names every folder with an __init__.py (a wheel would
    silently leave out a forgotten one)."""
    import tomllib

    listed = set(tomllib.loads((ROOT / "pyproject.toml").read_text())["tool"]["setuptools"]
                 ["packages"])
    found = {n for n, p in modules().items() if p.name == "__init__.py"}
    assert listed == found


def test_scripts_and_tests_import_what_exists():
    """Every ``from daemon... import x`` / ``from recursive... import x`` in tools/ and tests/
    names a module or an attribute that exists (a moved module once broke the CI-only soak)."""
    import importlib

    def ours(exc: ImportError) -> bool:
        # a missing optional third-party package (an extra not installed) is not this test's
        return not exc.name or exc.name.split(".")[0] in PACKAGES

    bad = []
    for folder in ("tools", "tests"):
        for path in sorted((ROOT / folder).rglob("*.py")):
            tree = ast.parse(path.read_text(encoding="utf-8"), str(path))
            for node in ast.walk(tree):
                if isinstance(node, ast.ImportFrom) and not node.level and node.module \
                        and node.module.split(".")[0] in PACKAGES:
                    try:
                        mod = importlib.import_module(node.module)
                    except ImportError as exc:
                        if ours(exc):
                            bad.append(f"{path.relative_to(ROOT)}:{node.lineno}: {exc}")
                        continue
                    for alias in node.names:
                        if alias.name == "*" or hasattr(mod, alias.name):
                            continue
                        try:
                            importlib.import_module(f"{node.module}.{alias.name}")
                        except ImportError:
                            bad.append(f"{path.relative_to(ROOT)}:{node.lineno}: "
                                       f"{node.module} has no {alias.name}")
                elif isinstance(node, ast.Import):
                    for alias in node.names:
                        if alias.name.split(".")[0] in PACKAGES:
                            try:
                                importlib.import_module(alias.name)
                            except ImportError as exc:
                                if ours(exc):
                                    bad.append(f"{path.relative_to(ROOT)}:{node.lineno}: {exc}")
    assert not bad, "\n".join(bad)
