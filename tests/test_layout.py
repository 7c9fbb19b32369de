"""The package layout: the renderer (the oracle) stays apart from the analysis."""

from __future__ import annotations

import ast
import re
from pathlib import Path

PKG = Path(__file__).resolve().parents[1] / "vidodo"
# Modules allowed to reach the renderer: the verbs that render runs.
RENDER_USERS = {"vidodo.commands.demo", "vidodo.commands.render"}


def _module_name(path: Path) -> str:
    rel = path.relative_to(PKG.parent).with_suffix("")
    parts = list(rel.parts)
    if parts[-1] == "__init__":
        parts = parts[:-1]
    return ".".join(parts)


def imported_modules(path: Path) -> set[str]:
    """Absolute names of every vidodo module imported anywhere in ``path`` (top level
    and inside functions)."""
    name = _module_name(path)
    package = name if path.name == "__init__.py" else name.rsplit(".", 1)[0]
    found: set[str] = set()
    for node in ast.walk(ast.parse(path.read_text(encoding="utf-8"))):
        if isinstance(node, ast.Import):
            found.update(a.name for a in node.names if a.name.startswith("vidodo"))
        elif isinstance(node, ast.ImportFrom):
            if node.level:
                base = package.split(".")
                base = base[: len(base) - (node.level - 1)]
                mod = ".".join(base + ([node.module] if node.module else []))
            else:
                mod = node.module or ""
            if not mod.startswith("vidodo"):
                continue
            found.add(mod)
            for alias in node.names:  # ``from . import x`` may name a submodule
                sub = f"{mod}.{alias.name}"
                if (PKG.parent / (sub.replace(".", "/") + ".py")).exists() or (
                    PKG.parent / sub.replace(".", "/")
                ).is_dir():
                    found.add(sub)
    return found


def test_no_analysis_module_imports_the_renderer():
    offenders = []
    for path in sorted(PKG.rglob("*.py")):
        name = _module_name(path)
        if name.startswith("vidodo.synth") or name in RENDER_USERS:
            continue
        bad = sorted(m for m in imported_modules(path) if m.startswith("vidodo.synth"))
        if bad:
            offenders.append(f"{name} imports {', '.join(bad)}")
    assert not offenders, "analysis modules must not import the renderer: " + "; ".join(offenders)


def test_boundary_check_sees_a_function_level_import(tmp_path):
    """The scanner finds an import hidden inside a function (how cycles used to hide)."""
    probe = PKG / "commands" / "render.py"
    assert "vidodo.synth.scenario" in imported_modules(probe)


def import_graph() -> dict[str, set[str]]:
    """Module -> the vidodo modules it imports (module level and inside functions).

    A package's ``__init__`` counts as imported with any of its submodules only when
    named itself; importing ``vidodo.x`` does not make every module depend on
    ``vidodo/__init__.py``."""
    names = {_module_name(p) for p in PKG.rglob("*.py")}
    graph = {}
    for path in sorted(PKG.rglob("*.py")):
        name = _module_name(path)
        graph[name] = {m for m in imported_modules(path) if m in names and m != name}
    return graph


def import_cycles(graph: dict[str, set[str]]) -> list[list[str]]:
    """Strongly connected components with more than one module (Tarjan's algorithm,
    iterative)."""
    index, low, on_stack, stack, out = {}, {}, set(), [], []
    counter = 0
    for root in sorted(graph):
        if root in index:
            continue
        work = [(root, iter(sorted(graph[root])))]
        index[root] = low[root] = counter
        counter += 1
        stack.append(root)
        on_stack.add(root)
        while work:
            node, children = work[-1]
            child = next(children, None)
            if child is not None:
                if child not in index:
                    index[child] = low[child] = counter
                    counter += 1
                    stack.append(child)
                    on_stack.add(child)
                    work.append((child, iter(sorted(graph.get(child, ())))))
                elif child in on_stack:
                    low[node] = min(low[node], index[child])
                continue
            work.pop()
            if work:
                low[work[-1][0]] = min(low[work[-1][0]], low[node])
            if low[node] == index[node]:
                comp = []
                while True:
                    m = stack.pop()
                    on_stack.discard(m)
                    comp.append(m)
                    if m == node:
                        break
                if len(comp) > 1:
                    out.append(sorted(comp))
    return out


def test_import_graph_is_acyclic():
    """No module reaches itself through imports, counting imports inside functions."""
    cycles = import_cycles(import_graph())
    assert not cycles, "import cycles: " + "; ".join(" <-> ".join(c) for c in cycles)


def test_cycle_finder_sees_a_cycle_through_a_function_level_import():
    """The cycle finder reports a loop of three and leaves a chain alone (worked by hand)."""
    assert import_cycles({"a": {"b"}, "b": {"c"}, "c": {"a"}, "d": {"a"}}) == [["a", "b", "c"]]
    assert import_cycles({"a": {"b"}, "b": {"c"}, "c": set()}) == []


DEVELOPERS = PKG.parent / "DEVELOPERS.md"
_WRITERS = {"atomic_file", "staged_dir", "savefig", "imwrite", "write_text", "write_bytes",
            "to_csv", "print_png"}


def _layout_rows() -> list[tuple[set[str], str]]:
    """The layout table of DEVELOPERS.md: (names in the first column, last column)."""
    text = DEVELOPERS.read_text(encoding="utf-8").split("## Layout", 1)[1].split("\n## ", 1)[0]
    rows = []
    for line in text.splitlines():
        cells = [c.strip() for c in line.strip().strip("|").split("|")]
        if len(cells) >= 3 and "`" in cells[0]:
            rows.append((set(re.findall(r"`([^`]+)`", cells[0])), cells[-1]))
    return rows


def _writes_files(path: Path) -> bool:
    """True when the module calls something that writes a file (atomic files, staged
    folders, CSV, figures, images, text and bytes)."""
    for node in ast.walk(ast.parse(path.read_text(encoding="utf-8"))):
        if isinstance(node, ast.Call):
            f = node.func
            name = f.attr if isinstance(f, ast.Attribute) else getattr(f, "id", None)
            if name in _WRITERS:
                return True
    return False


def _row_of(rel: str, rows):
    folder, _, stem = rel.rpartition("/")
    for names, files in rows:
        if rel in names or any(n.endswith("/") and f"{folder}/".startswith(n)
                               and stem.removesuffix(".py") in names for n in names):
            return files
    return None


def test_layout_table_is_true():
    """Every library module has a row in DEVELOPERS.md's layout table, and every one that
    writes files says so in the last column."""
    rows = _layout_rows()
    missing, unmarked = [], []
    for path in sorted(PKG.rglob("*.py")):
        rel = path.relative_to(PKG).as_posix()
        if rel.startswith("commands/") or path.name == "__init__.py" or rel == "cli_main.py":
            continue
        files = _row_of(rel, rows)
        if files is None:
            missing.append(rel)
        elif _writes_files(path) and "write" not in files:
            unmarked.append(rel)
    assert not missing, f"modules without a row in the layout table: {missing}"
    assert not unmarked, f"modules that write files, marked otherwise: {unmarked}"
