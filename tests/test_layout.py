"""The package layout: the renderer (the oracle) stays apart from the analysis."""

from __future__ import annotations

import ast
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
