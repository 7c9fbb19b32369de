"""Size limits of the library's functions (project rule, DEVELOPERS.md "Style"): no
function over 100 lines of code, no public function over 8 parameters (the rest go into
a frozen settings dataclass).

Lines of code are the lines holding a token of the function's source other than its
docstring, comments and blank lines (Python's own tokenizer decides, so a string or a
bracket spanning lines counts every line it covers). Parameters are all of a
function's parameters (positional, keyword-only, ``*args``, ``**kwargs``) except
``self`` and ``cls``; a function is public when its name has no leading underscore.
"""

from __future__ import annotations

import ast
import io
import tokenize
from pathlib import Path

PKG = Path(__file__).resolve().parents[1] / "vidodo"

MAX_CODE_LINES = 100
MAX_PUBLIC_PARAMS = 8

_SKIP = {tokenize.COMMENT, tokenize.NL, tokenize.NEWLINE, tokenize.INDENT, tokenize.DEDENT,
         tokenize.ENDMARKER}


def _docstring_lines(node) -> range:
    first = node.body[0] if node.body else None
    if (isinstance(first, ast.Expr) and isinstance(first.value, ast.Constant)
            and isinstance(first.value.value, str)):
        return range(first.lineno, first.end_lineno + 1)
    return range(0)


def code_lines(source_lines: list[str], node) -> int:
    """Lines of code of a function: lines with a token, docstring, comments and blank
    lines not counted (decorators are not part of the function's lines)."""
    text = "".join(source_lines[node.lineno - 1:node.end_lineno])
    doc = _docstring_lines(node)
    lines = set()
    for tok in tokenize.generate_tokens(io.StringIO(text).readline):
        if tok.type in _SKIP:
            continue
        for k in range(tok.start[0], tok.end[0] + 1):
            line = k + node.lineno - 1
            if line not in doc:
                lines.add(line)
    return len(lines)


def parameters(node) -> list[str]:
    """Every parameter name of a function, ``self`` and ``cls`` left out."""
    a = node.args
    names = [p.arg for p in (*a.posonlyargs, *a.args, *a.kwonlyargs)]
    names += [p.arg for p in (a.vararg, a.kwarg) if p is not None]
    return [n for n in names if n not in ("self", "cls")]


def _functions():
    for path in sorted(PKG.rglob("*.py")):
        source = path.read_text(encoding="utf-8")
        lines = source.splitlines(keepends=True)
        for node in ast.walk(ast.parse(source)):
            if isinstance(node, (ast.FunctionDef, ast.AsyncFunctionDef)):
                yield path.relative_to(PKG.parent).as_posix(), lines, node


def test_counting_rules_on_a_known_function():
    """The counters on a function whose counts are known by reading it: 4 code lines
    (signature, a statement over two lines, the return; docstring, comment and blank
    line left out) and 4 parameters (self left out, *args and **kwargs counted)."""
    source = (
        "class A:\n"
        "    def f(self, a, *args, b=1, **kw):\n"
        '        """Doc\n'
        '        string."""\n'
        "        # a comment\n"
        "\n"
        "        x = (a +\n"
        "             b)\n"
        "        return x\n"
    )
    node = ast.parse(source).body[0].body[0]
    lines = source.splitlines(keepends=True)
    assert code_lines(lines, node) == 4  # def line, the two lines of x = (...), return
    assert parameters(node) == ["a", "b", "args", "kw"]


def test_no_function_over_100_lines_of_code():
    """No function of the library is longer than 100 lines of code."""
    long = [f"{rel}:{node.lineno} {node.name} ({n} lines)"
            for rel, lines, node in _functions()
            if (n := code_lines(lines, node)) > MAX_CODE_LINES]
    assert not long, f"functions over {MAX_CODE_LINES} lines of code: {long}"


def test_no_public_function_over_8_parameters():
    """No public function or method of the library takes more than 8 parameters."""
    wide = [f"{rel}:{node.lineno} {node.name} ({n} parameters)"
            for rel, _, node in _functions()
            if not node.name.startswith("_")
            and (n := len(parameters(node))) > MAX_PUBLIC_PARAMS]
    assert not wide, (f"public functions over {MAX_PUBLIC_PARAMS} parameters (use a frozen "
                      f"settings dataclass): {wide}")
