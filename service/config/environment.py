"""Environment overrides of the configuration: ``RWLS_A__B=value`` sets key ``a.b``.

Double underscore separates levels; levels are lower-cased except the one after
``channels`` (a channel id keeps its case). A value is read as a TOML value when
it parses (``9090`` an int, ``true``, ``[...]``, an inline table), else as text;
keys that hold text always get text, so ``RWLS_BROKER__PASSWORD=1234`` stays a
string.
"""

from __future__ import annotations

import tomllib
import types
from collections.abc import Mapping
from typing import Union, get_args, get_origin

from pydantic import BaseModel, SecretStr

__all__ = ["ENV_PREFIX", "apply_environment"]

ENV_PREFIX = "RWLS_"


def _is_text(annotation: object) -> bool:
    if annotation in (str, SecretStr):
        return True
    if get_origin(annotation) in (Union, types.UnionType):
        return any(_is_text(arg) for arg in get_args(annotation))
    return False


def _wants_text(model: type[BaseModel], path: tuple[str, ...]) -> bool:
    """Whether the key at ``path`` holds text (so ``RWLS_BROKER__PASSWORD=1234`` stays a string)."""
    annotation: object = model
    levels = iter(path)
    for name in levels:
        if not (isinstance(annotation, type) and issubclass(annotation, BaseModel)):
            return False
        field = annotation.model_fields.get(name)
        if field is None:
            return False
        annotation = field.annotation
        if get_origin(annotation) is dict:
            if next(levels, None) is None:  # the dict itself, not one of its entries
                return False
            annotation = get_args(annotation)[1]
    return _is_text(annotation)


def _env_value(text: str, text_key: bool) -> object:
    # A newline could smuggle a second TOML key in; such a value is taken as text.
    if "\n" not in text and "\r" not in text:
        try:
            value = tomllib.loads(f"value = {text}")["value"]
        except tomllib.TOMLDecodeError:
            pass
        else:
            if not text_key or isinstance(value, str):
                return value
    return text


def _env_path(name: str) -> tuple[str, ...] | None:
    """The key path ``RWLS_A__B`` names, ``("a", "b")``; ``None`` when a level is empty."""
    levels = name[len(ENV_PREFIX):].split("__")
    if not all(levels):
        return None
    path = [level.lower() for level in levels]
    if path[0] == "channels" and len(levels) > 1:
        path[1] = levels[1]  # channel ids are case-sensitive
    return tuple(path)


def apply_environment(data: dict[str, object], environ: Mapping[str, str], model: type[BaseModel]
                      ) -> tuple[dict[str, object], dict[tuple[str, ...], str], list[str]]:
    """``data`` with every ``RWLS_`` variable applied (a copy), which variable set which key, and problems.

    Variables apply in name order, so ``RWLS_BROKER`` (a whole table) comes before
    ``RWLS_BROKER__URL``, which then overrides one key in it. ``model`` tells which
    keys hold text.
    """
    merged = dict(data)
    sources: dict[tuple[str, ...], str] = {}
    problems: list[str] = []
    for name in sorted(n for n in environ if n.startswith(ENV_PREFIX)):
        path = _env_path(name)
        if path is None:
            problems.append(f"{name}: empty key level; separate levels with exactly two underscores")
            continue
        table = merged
        for depth, level in enumerate(path[:-1]):
            inner = table.get(level, {})
            if not isinstance(inner, dict):
                problems.append(f"{'.'.join(path[:depth + 1])}: not a table, so {name} cannot set a key in it")
                break
            copied: dict[str, object] = dict(inner)  # so the caller's document is left as it was
            table[level] = copied
            table = copied
        else:
            table[path[-1]] = _env_value(environ[name], _wants_text(model, path))
            sources[path] = name
    return merged, sources, problems
