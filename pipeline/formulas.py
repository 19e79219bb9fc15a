"""Reading model formulas (patsy right-hand sides) without fitting them."""

from __future__ import annotations

import ast

import patsy


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


def without_terms(casemix: str, variables: tuple[str, ...]) -> str:
    """The case-mix formula with every term that uses one of ``variables`` removed ("1" if none is
    left).

    Terms are expanded by patsy first, so in ``age * deprivation`` only ``deprivation`` and
    ``age:deprivation`` go and ``age`` stays.
    """
    terms = patsy.ModelDesc.from_formula(casemix).rhs_termlist
    kept = [
        t
        for t in terms
        if t.factors
        and not set(formula_variables(" + ".join(f.code for f in t.factors))) & set(variables)
    ]
    return " + ".join(":".join(f.code for f in t.factors) for t in kept) if kept else "1"
