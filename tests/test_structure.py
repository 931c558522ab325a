"""Structure rules of issue 20: no function over 80 body lines without a
stated reason, and no one- or two-letter private helper names at module or class level.

The 80-line limit is common practice, no source (a function a reader can hold
on one screen). Body lines are counted with :mod:`ast` from the first
statement after the docstring to the function's last line, so a long
docstring does not count against a function.
"""

from __future__ import annotations

import ast
from pathlib import Path

import linkage

PACKAGE = Path(linkage.__file__).parent
MAX_BODY_LINES = 80

#: functions allowed over the limit, "path:qualified name" -> why
ALLOWED = {
}


def _body_lines(node: ast.FunctionDef | ast.AsyncFunctionDef) -> int:
    """Lines from the first statement after the docstring to the function's end (0 for a docstring alone)."""
    body = node.body
    if (isinstance(body[0], ast.Expr) and isinstance(body[0].value, ast.Constant)
            and isinstance(body[0].value.value, str)):
        body = body[1:]
    return 0 if not body else node.end_lineno - body[0].lineno + 1


def _functions(tree: ast.AST, prefix: str = ""):
    """(qualified name, node) of every function, methods and nested functions included."""
    for node in ast.iter_child_nodes(tree):
        if isinstance(node, (ast.FunctionDef, ast.AsyncFunctionDef)):
            yield prefix + node.name, node
            yield from _functions(node, prefix + node.name + ".")
        elif isinstance(node, ast.ClassDef):
            yield from _functions(node, prefix + node.name + ".")
        else:
            yield from _functions(node, prefix)


def _modules():
    for path in sorted(PACKAGE.rglob("*.py")):
        yield path.relative_to(PACKAGE.parent).as_posix(), ast.parse(path.read_text(encoding="utf-8"))


def long_functions() -> dict[str, int]:
    """Every function of the package over :data:`MAX_BODY_LINES` body lines, "path:name" -> body lines."""
    return {f"{path}:{name}": n for path, tree in _modules() for name, node in _functions(tree)
            if (n := _body_lines(node)) > MAX_BODY_LINES}


def test_body_lines_counts_from_after_the_docstring():
    # a function of a 3-line docstring and 2 statements has 2 body lines; the same without docstring too
    with_doc = ast.parse('def f():\n    """a\n    b\n    """\n    x = 1\n    return x\n').body[0]
    without = ast.parse("def f():\n    x = 1\n    return x\n").body[0]
    assert _body_lines(with_doc) == 2 and _body_lines(without) == 2


def test_no_new_long_function():
    found = long_functions()
    new = sorted(set(found) - set(ALLOWED))
    assert not new, ("functions over %d body lines (split them into named steps, or add them to ALLOWED with "
                     "the reason): %s" % (MAX_BODY_LINES, ", ".join(f"{k} ({found[k]})" for k in new)))


def test_allow_list_is_current():
    # an entry whose function is gone or now short is removed, so that the list stays a list of reasons
    stale = sorted(set(ALLOWED) - set(long_functions()))
    assert not stale, f"ALLOWED entries no longer over {MAX_BODY_LINES} body lines: {stale}"
    assert all(reason.strip() for reason in ALLOWED.values())


def test_no_one_letter_module_helpers():
    # a private helper at module or class level is read far from where it is defined: it gets a descriptive
    # name, not one or two letters (_f, _z, _pm); nested closures in a tight scope are left alone
    short = []
    for path, tree in _modules():
        scopes = [tree] + [n for n in ast.walk(tree) if isinstance(n, ast.ClassDef)]
        for scope in scopes:
            for node in scope.body:
                if (isinstance(node, (ast.FunctionDef, ast.AsyncFunctionDef)) and node.name.startswith("_")
                        and not node.name.endswith("__") and len(node.name.strip("_")) <= 2):
                    short.append(f"{path}:{node.name}")
    assert not short, f"helpers with a one- or two-letter name: {short}"
