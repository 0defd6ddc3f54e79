"""Bounded JSON reading for files a user (or an attacker) may have edited.

:func:`loads_bounded` parses JSON text like :func:`json.loads` but refuses,
before or while parsing and with a message naming the file:

- text longer than ``max_chars``;
- nesting deeper than ``max_depth`` (the standard parser would recurse until
  ``RecursionError``);
- more than ``max_items`` values in all (bounds the work of what follows);
- ``NaN``, ``Infinity`` and numbers that overflow a float (``1e999``);
- integers with more than ``max_int_digits`` digits (a 5000-digit number).
"""

from __future__ import annotations

import json
import math
import re
from typing import Any

import numpy as np

__all__ = ["JsonLimitError", "loads_bounded", "max_nesting_depth"]

_STRING = re.compile(r'"(?:[^"\\]|\\.)*"', re.DOTALL)


class JsonLimitError(ValueError):
    """JSON text breaks one of the bounds of :func:`loads_bounded` (or is not JSON)."""


def max_nesting_depth(text: str) -> int:
    """The deepest nesting of ``[`` and ``{`` in JSON text (brackets inside strings ignored)."""
    bare = _STRING.sub('""', text)
    codes = np.frombuffer(bare.encode("utf-8", "surrogatepass"), dtype=np.uint8)
    step = np.zeros(codes.shape, dtype=np.int64)
    step[(codes == ord("[")) | (codes == ord("{"))] = 1
    step[(codes == ord("]")) | (codes == ord("}"))] = -1
    if step.size == 0:
        return 0
    return int(np.cumsum(step).max(initial=0))


def loads_bounded(text: str, *, what: str, max_chars: int = 64_000_000, max_depth: int = 64,
                  max_items: int = 2_000_000, max_int_digits: int = 30) -> Any:
    """Parse JSON text within bounds.

    Parameters
    ----------
    text : str
        The JSON text.
    what : str
        Names the source in messages (e.g. ``"session file /a/b.saedkit.json"``).
    max_chars, max_depth, max_items, max_int_digits : int
        The bounds (see the module notes).

    Raises
    ------
    JsonLimitError
        Naming ``what`` and the bound broken, or the JSON syntax error and its line.
    """
    if len(text) > max_chars:
        raise JsonLimitError(f"{what} is {len(text)} characters long, more than the {max_chars} allowed")
    depth = max_nesting_depth(text)
    if depth > max_depth:
        raise JsonLimitError(f"{what} nests {depth} levels deep, more than the {max_depth} allowed")
    count = [0]

    def _tick() -> None:
        count[0] += 1
        if count[0] > max_items:
            raise JsonLimitError(f"{what} holds more than {max_items} values")

    def _const(name: str) -> float:
        raise JsonLimitError(f"{what} holds {name}, which is not a number JSON allows")

    def _float(s: str) -> float:
        _tick()
        if len(s) > 400:
            raise JsonLimitError(f"{what} holds a number written with {len(s)} characters")
        v = float(s)
        if not math.isfinite(v):
            raise JsonLimitError(f"{what} holds the number {s[:40]}, beyond the range of a float")
        return v

    def _int(s: str) -> int:
        _tick()
        digits = len(s.lstrip("-"))
        if digits > max_int_digits:
            raise JsonLimitError(f"{what} holds an integer of {digits} digits (at most {max_int_digits} allowed)")
        return int(s)

    def _hook(pairs: list) -> dict:
        _tick()
        return dict(pairs)

    try:
        return json.loads(text, parse_constant=_const, parse_float=_float, parse_int=_int,
                          object_pairs_hook=_hook)
    except json.JSONDecodeError as exc:
        raise JsonLimitError(f"{what} is not valid JSON ({exc.msg} at line {exc.lineno})") from None
    except RecursionError:  # pragma: no cover - the depth check comes first
        raise JsonLimitError(f"{what} nests too deeply") from None
