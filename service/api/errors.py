"""Request validation errors as short, stable JSON that names each field and its problem.

``{"detail": "invalid query parameter limit: must be at least 1", "errors": [{"field": "query.limit",
"problem": "must be at least 1"}]}``: ``detail`` reads as one line for a person, ``errors`` lists every
problem for a program. The values sent are never echoed back.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from typing import Any

from fastapi.responses import JSONResponse

__all__ = ["not_found", "validation_problems"]

_WHERE = {"path": "path parameter", "query": "query parameter", "header": "header", "body": "body field",
          "cookie": "cookie"}


def _field(location: Sequence[Any]) -> tuple[str, str]:
    """``("query", "limit")`` -> ``("query", "limit")``; ``("body", "items", 2, "y")`` -> ``("body", "items[2].y")``."""
    where = str(location[0]) if location else "request"
    name = ""
    for part in location[1:]:
        name += f"[{part}]" if isinstance(part, int) else (f".{part}" if name else str(part))
    return where, name


def _problem(error: Mapping[str, Any]) -> str:
    """pydantic's message, shortened where it has a plainer wording of ours."""
    kind = str(error.get("type", ""))
    context = error.get("ctx") or {}
    plain = {
        "greater_than_equal": "must be at least {ge}", "greater_than": "must be greater than {gt}",
        "less_than_equal": "must be at most {le}", "less_than": "must be less than {lt}",
        "missing": "is required", "int_parsing": "must be an integer", "float_parsing": "must be a number",
        "finite_number": "must be a finite number", "json_invalid": "is not valid JSON",
        "extra_forbidden": "is not a known field",
    }.get(kind)
    if plain is not None:
        try:
            return plain.format(**context)
        except (KeyError, IndexError):
            pass
    return str(error.get("msg", "is invalid")).rstrip(".")


def validation_problems(errors: Sequence[Mapping[str, Any]]) -> dict[str, object]:
    """The 422 body for pydantic/FastAPI validation ``errors`` (``RequestValidationError.errors()``)."""
    listed = []
    for error in errors:
        where, name = _field(tuple(error.get("loc", ())))
        listed.append({"field": f"{where}.{name}" if name else where, "problem": _problem(error),
                       "_where": where, "_name": name})
    if not listed:
        return {"detail": "invalid request", "errors": []}
    first = listed[0]
    subject = f"invalid {_WHERE.get(first['_where'], first['_where'])}"
    subject += f" {first['_name']}" if first["_name"] else ""
    more = f" (and {len(listed) - 1} more)" if len(listed) > 1 else ""
    return {"detail": f"{subject}: {first['problem']}{more}",
            "errors": [{"field": e["field"], "problem": e["problem"]} for e in listed]}


def not_found(what: str) -> JSONResponse:
    """A 404 with the short stable body every route uses: ``{"detail": what}``."""
    return JSONResponse({"detail": what}, status_code=404)
