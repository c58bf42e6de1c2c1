"""JSON Pointer (RFC 6901): one value inside a parsed JSON document, found by a path like ``/data/0/v``.

The pointer is parsed once (:class:`JsonPointer`); evaluating it is a walk of a few dict and list
look-ups. RFC 6901 rules: ``""`` is the whole document; each ``/`` starts a reference token, in
which ``~1`` stands for ``/`` and ``~0`` for ``~`` (``~1`` is undone first, so ``~01`` is ``~1``);
in an array a token names an index written as ``0`` or digits without a leading zero, and ``-``
(the element after the last) never exists. A pointer that leads nowhere gives :data:`MISSING`.
"""

from __future__ import annotations

from typing import Final

__all__ = ["MISSING", "JsonPointer"]


class _Missing:
    __slots__ = ()

    def __repr__(self) -> str:
        return "MISSING"


MISSING: Final = _Missing()
"""What :meth:`JsonPointer.resolve` gives when the document has nothing at the pointer."""


def _array_index(token: str) -> int | None:
    """The array index a token names, or None (RFC 6901 section 4: ``0`` or no leading zero, ASCII digits)."""
    if token.isascii() and token.isdigit() and (token == "0" or token[0] != "0"):
        return int(token)
    return None


class JsonPointer:
    """A parsed RFC 6901 pointer.

    Parameters
    ----------
    text : str
        ``""`` or ``/token/token/...``.

    Raises
    ------
    ValueError
        Not a JSON Pointer: text that does not start with ``/``, or ``~`` not followed by ``0`` or ``1``.
    """

    __slots__ = ("_steps", "text")

    def __init__(self, text: str) -> None:
        if text and not text.startswith("/"):
            raise ValueError(f"a JSON Pointer is '' or starts with '/', got {text[:40]!r}")
        steps: list[tuple[str, int | None]] = []
        for raw in text.split("/")[1:]:
            if raw.replace("~0", "").replace("~1", "").count("~"):
                raise ValueError(f"'~' must be followed by 0 or 1 in a JSON Pointer, got {text[:40]!r}")
            token = raw.replace("~1", "/").replace("~0", "~")
            steps.append((token, _array_index(token)))
        self.text = text
        self._steps = tuple(steps)

    @property
    def tokens(self) -> tuple[str, ...]:
        """The reference tokens, unescaped."""
        return tuple(token for token, _ in self._steps)

    def resolve(self, document: object) -> object:
        """The value at the pointer, or :data:`MISSING` when the document has none there.

        ``document`` is what a JSON parser gives (dicts, lists, str, numbers, bools, None);
        a JSON ``null`` at the pointer comes back as None.
        """
        node = document
        for token, index in self._steps:
            if type(node) is dict:
                if token not in node:
                    return MISSING
                node = node[token]
            elif type(node) is list:
                if index is None or index >= len(node):
                    return MISSING
                node = node[index]
            else:
                return MISSING
        return node

    def __repr__(self) -> str:
        return f"JsonPointer({self.text!r})"
