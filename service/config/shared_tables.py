"""Channel tables validated once per distinct table: a plant's channels are often alike but for their topic.

Validating 100,000 channel tables one by one took 5 s (pydantic, measured), most of it on tables that differ only
in ``topic``. :func:`validate_alike_once` groups the tables by everything but the topic, validates one table of
each group and gives the others a copy with their own topic, after the same topic check the model makes. A group
whose table fails, and any member whose topic fails, stays as given: pydantic then validates it where it stands,
so every error names its own channel's key exactly as before.
"""

from __future__ import annotations

from collections.abc import Callable, Hashable
from typing import TypeVar

from pydantic import BaseModel, ValidationError

__all__ = ["validate_alike_once"]

Model = TypeVar("Model", bound=BaseModel)

_TOPIC = "topic"


def _frozen(value: object) -> Hashable:
    """A hashable form of a TOML value that tells apart what validation might (``1``, ``1.0`` and ``True``)."""
    if isinstance(value, dict):
        return (dict, tuple(sorted((str(k), _frozen(v)) for k, v in value.items())))
    if isinstance(value, list | tuple):
        return (list, tuple(_frozen(v) for v in value))
    if isinstance(value, str | int | float | bool) or value is None:
        return (type(value), value)
    raise TypeError(f"no key for {type(value).__name__}")


def _key(table: dict[object, object]) -> Hashable | None:
    """What makes two tables alike: all but the topic, and the topic's type (None when it cannot be keyed)."""
    try:
        rest = tuple(sorted((str(k), _frozen(v)) for k, v in table.items() if k != _TOPIC))
    except TypeError:
        return None
    return rest, type(table.get(_TOPIC))


def validate_alike_once(tables: object, model: type[Model], check_topic: Callable[[str], str]) -> object:
    """``tables`` (channel id -> table) with each table that validates replaced by its model instance.

    Parameters
    ----------
    tables : what the configuration holds under ``channels``; anything but a dict comes back as it is
    model : the channel table's model; its ``topic`` field is a string or None, checked by ``check_topic``
    check_topic : the model's own check of a topic (``ValueError`` when bad)

    Returns
    -------
    dict or object
        Channel id -> model instance (or the table as given, for pydantic to validate and report), in order.
    """
    if not isinstance(tables, dict):
        return tables
    groups: dict[Hashable, list[object]] = {}
    for cid, table in tables.items():
        key = _key(table) if isinstance(table, dict) else None
        if key is not None:
            groups.setdefault(key, []).append(cid)
    out = dict(tables)
    for members in groups.values():
        first = tables[members[0]]
        try:
            validated = model.model_validate(first)
        except ValidationError:
            continue                         # each member is validated again in place: errors by key
        out[members[0]] = validated
        # The copies share the validated values and one set of the fields given (model_construct: no second
        # validation, and a third less memory than model_copy, which copies that set for each).
        values = dict(validated)
        given = validated.model_fields_set | {_TOPIC}
        for cid in members[1:]:
            topic = tables[cid].get(_TOPIC)
            if topic is None:
                out[cid] = validated         # alike in every field: one frozen instance serves them all
                continue
            try:
                check_topic(topic)
            except ValueError:
                continue
            values[_TOPIC] = topic
            out[cid] = model.model_construct(given, **values)
    return out
