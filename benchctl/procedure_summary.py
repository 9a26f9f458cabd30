"""What a procedure file declares, read from its source without running it.

Importing a procedure runs its module code (it is Python, with the user's rights), so a
listing that only needs names, descriptions, roles and parameters reads them from the
syntax tree (:mod:`ast`): module-level ``NAME``, ``DESCRIPTION`` (or the docstring's first
line), ``ROLES`` and ``PARAMETERS`` written as literals - a list of ``Parameter(...)`` calls
with literal arguments, and ``*power_parameters(...)`` (benchctl's own helper). A file
whose declarations are computed cannot be read this way; :func:`read_summary` then says
so, and the caller decides whether importing it is acceptable.
"""

from __future__ import annotations

import ast
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from benchctl.errors import ProcedureError


@dataclass(frozen=True)
class ProcedureSummary:
    """Name, description, roles and parameters of a procedure file, as declared in it."""

    name: str
    description: str
    roles: tuple[str, ...]
    parameters: tuple[Any, ...]  # benchctl.procedure.Parameter
    path: Path


class NotStatic(ProcedureError):
    """The file's declarations are not literals; they can be read only by importing it."""


def _literal(node: ast.AST, where: str) -> Any:
    try:
        return ast.literal_eval(node)
    except (ValueError, TypeError, SyntaxError, RecursionError) as exc:
        raise NotStatic(f"{where} (line {getattr(node, 'lineno', '?')}) is not a literal") from exc


def _call_name(node: ast.AST) -> str:
    func = node.func if isinstance(node, ast.Call) else None
    if isinstance(func, ast.Name):
        return func.id
    if isinstance(func, ast.Attribute):
        return func.attr
    return ""


def _call(node: ast.Call, where: str) -> tuple[list[Any], dict[str, Any]]:
    args = [_literal(a, where) for a in node.args]
    kwargs = {}
    for kw in node.keywords:
        if kw.arg is None:
            raise NotStatic(f"{where} (line {node.lineno}) passes **keywords")
        kwargs[kw.arg] = _literal(kw.value, f"{where}, {kw.arg}=")
    return args, kwargs


def _parameters(node: ast.AST, path: Path) -> tuple[Any, ...]:
    from benchctl.procedure import Parameter, power_parameters

    if not isinstance(node, (ast.List, ast.Tuple)):
        raise NotStatic(f"{path}: PARAMETERS (line {node.lineno}) is not a list")
    out: list[Any] = []
    for item in node.elts:
        if isinstance(item, ast.Starred) and _call_name(item.value) == "power_parameters":
            args, kwargs = _call(item.value, f"{path}: power_parameters(...)")
            out.extend(power_parameters(*args, **kwargs))
        elif isinstance(item, ast.Call) and _call_name(item) == "Parameter":
            args, kwargs = _call(item, f"{path}: Parameter(...)")
            out.append(Parameter(*args, **kwargs))
        else:
            raise NotStatic(f"{path}: PARAMETERS item at line {item.lineno} is neither Parameter(...) nor "
                            "*power_parameters(...)")
    return tuple(out)


def _roles(node: ast.AST, path: Path) -> tuple[Any, ...]:
    """``ROLES`` written as names and ``Role(...)`` calls with literal arguments."""
    from benchctl.procedure import Role, declared_roles

    if not isinstance(node, (ast.List, ast.Tuple)):
        return declared_roles(_literal(node, f"{path}: ROLES"), f"{path}: ROLES")
    items: list[Any] = []
    for item in node.elts:
        if isinstance(item, ast.Call) and _call_name(item) == "Role":
            args, kwargs = _call(item, f"{path}: Role(...)")
            items.append(Role(*args, **kwargs))
        else:
            items.append(_literal(item, f"{path}: ROLES item"))
    return declared_roles(items, f"{path}: ROLES")


def read_summary(path: str | Path) -> ProcedureSummary:
    """The declarations of the procedure file at ``path``, read without running any of it.

    Raises :class:`NotStatic` when they are computed, ProcedureError when the file is not
    Python or declares no ``ROLES`` / ``PARAMETERS``.
    """
    path = Path(path)
    try:
        tree = ast.parse(path.read_bytes(), filename=str(path))
    except (OSError, SyntaxError, ValueError) as exc:
        raise ProcedureError(f"procedure file {path} cannot be read: {exc}") from exc
    found: dict[str, ast.AST] = {}
    for stmt in tree.body:
        targets = stmt.targets if isinstance(stmt, ast.Assign) else [stmt.target] if isinstance(stmt, ast.AnnAssign) else []
        value = getattr(stmt, "value", None)
        for target in targets:
            if isinstance(target, ast.Name) and target.id in ("NAME", "DESCRIPTION", "ROLES", "PARAMETERS") and value:
                found[target.id] = value
    missing = [k for k in ("ROLES", "PARAMETERS") if k not in found]
    if missing:
        raise ProcedureError(f"{path} is not a benchctl procedure: it declares no module-level {', '.join(missing)}")
    doc = (ast.get_docstring(tree) or "").strip()
    name = _literal(found["NAME"], f"{path}: NAME") if "NAME" in found else path.stem
    description = (_literal(found["DESCRIPTION"], f"{path}: DESCRIPTION") if "DESCRIPTION" in found
                   else (doc.splitlines()[0] if doc else ""))
    roles = _roles(found["ROLES"], path)
    return ProcedureSummary(name=str(name), description=str(description), roles=roles,
                            parameters=_parameters(found["PARAMETERS"], path), path=path)
