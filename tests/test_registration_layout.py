"""The registration package: no import cycles between its modules (common practice:
an acyclic module graph lets each layer be read and tested on its own)."""

from __future__ import annotations

from pathlib import Path

from test_layout import PKG, _module_name, imported_modules


def _graph(folder: Path) -> dict[str, set[str]]:
    names = {_module_name(p): p for p in folder.rglob("*.py")}
    graph = {}
    for name, path in names.items():
        deps = {m for m in imported_modules(path) if m in names and m != name}
        graph[name] = {d for d in deps if not name.startswith(d + ".")}  # not the parents
    return graph


def _cycle(graph: dict[str, set[str]]) -> list[str] | None:
    state: dict[str, int] = {}
    stack: list[str] = []

    def visit(n):
        state[n] = 1
        stack.append(n)
        for m in sorted(graph.get(n, ())):
            if state.get(m) == 1:
                return stack[stack.index(m):] + [m]
            if m not in state:
                found = visit(m)
                if found:
                    return found
        state[n] = 2
        stack.pop()
        return None

    for n in sorted(graph):
        if n not in state:
            found = visit(n)
            if found:
                return found
    return None


def test_registration_package_is_acyclic():
    graph = _graph(PKG / "registration")
    assert "vidodo.registration.registrar" in graph
    assert _cycle(graph) is None, " -> ".join(_cycle(graph))


def test_cycle_finder_finds_a_cycle():
    assert _cycle({"a": {"b"}, "b": {"c"}, "c": {"a"}}) == ["a", "b", "c", "a"]
    assert _cycle({"a": {"b"}, "b": set()}) is None
