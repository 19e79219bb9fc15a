"""Reading model formulas (patsy right-hand sides) without fitting them."""

from __future__ import annotations

import ast


def formula_variables(rhs: str) -> list[str]:
    """Column names a patsy right-hand side uses (function names such as C or np.log excluded)."""
    try:
        # patsy's interaction operator ':' is not Python; any binary operator parses the same names
        tree = ast.parse(rhs.replace("~", " ").replace(":", "*"), mode="eval")
    except SyntaxError as exc:
        raise ValueError(f"'{rhs}' is not a valid formula: {exc.msg}") from None
    called = {id(n.func) for n in ast.walk(tree) if isinstance(n, ast.Call)}
    attr_bases = {id(n.value) for n in ast.walk(tree) if isinstance(n, ast.Attribute)}
    found = [
        n
        for n in ast.walk(tree)
        if isinstance(n, ast.Name) and id(n) not in called and id(n) not in attr_bases
    ]
    # in the order they are written
    names = [n.id for n in sorted(found, key=lambda n: n.col_offset)]
    return list(dict.fromkeys(names))
