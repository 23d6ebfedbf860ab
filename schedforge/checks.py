"""Value checks shared by the spec reader and the model's own validators.

Each check takes a value and the path of the field it came from (``bath.eta``,
``problem.J[2][0]``) and returns the value as the model stores it, or raises
:class:`~schedforge.errors.InputError` naming the path and the rule.  The spec
reader (:mod:`schedforge.spec`) uses them to read the TOML types; each spec
section's value rules live with its concept (``check_problem`` in
:mod:`schedforge.hamiltonian`, ``check_bath`` in :mod:`schedforge.bath`,
``check_waveform`` in :mod:`schedforge.waveform`) and use them too, so a spec read
from TOML and one built in Python meet the same rules and the same messages.
"""

from __future__ import annotations

import difflib
import math
import numbers
from collections.abc import Sequence
from datetime import date, datetime, time
from typing import Any

from .errors import InputError

__all__ = [
    "ECHO_CHARS",
    "boolean",
    "choice",
    "clip",
    "integer",
    "is_number",
    "number",
    "shown",
    "suggest",
    "toml_type",
]

#: Longest text of a value echoed in a message.
ECHO_CHARS = 60


def toml_type(value: Any) -> str:
    """Name of a value's TOML type, for messages."""
    if isinstance(value, bool):
        return "boolean"
    if isinstance(value, int):
        return "integer"
    if isinstance(value, float):
        return "float"
    if isinstance(value, str):
        return "string"
    if isinstance(value, list):
        return "array"
    if isinstance(value, dict):
        return "table"
    if isinstance(value, datetime | date | time):
        return "date/time"
    return type(value).__name__


def clip(value: Any) -> str:
    """``repr(value)``, cut to a short length for messages."""
    text = repr(value)
    if len(text) > ECHO_CHARS:
        text = text[: ECHO_CHARS - 3] + "..."
    return text


def shown(value: Any) -> str:
    """A value as shown in a message: its TOML type and a short repr."""
    return f"{toml_type(value)} {clip(value)}"


def is_number(value: Any) -> bool:
    """A real number that is not a boolean (NumPy scalars included)."""
    return isinstance(value, numbers.Real) and not isinstance(value, bool)


def number(
    value: Any,
    path: str,
    *,
    gt: float | None = None,
    ge: float | None = None,
    lt: float | None = None,
    le: float | None = None,
) -> float:
    """Check a finite number within bounds; return it as ``float``."""
    if not is_number(value):
        raise InputError(path, f"must be a number, got {shown(value)}")
    x = float(value)
    if not math.isfinite(x):
        raise InputError(path, f"must be a finite number, got {clip(value)}")
    bounds = []
    if gt is not None:
        bounds.append(f"> {gt:g}")
    if ge is not None:
        bounds.append(f">= {ge:g}")
    if lt is not None:
        bounds.append(f"< {lt:g}")
    if le is not None:
        bounds.append(f"<= {le:g}")
    ok = (
        (gt is None or x > gt)
        and (ge is None or x >= ge)
        and (lt is None or x < lt)
        and (le is None or x <= le)
    )
    if not ok:
        raise InputError(path, f"must be a number {' and '.join(bounds)}, got {clip(value)}")
    return x


def integer(value: Any, path: str, *, ge: int | None = None, le: int | None = None) -> int:
    """Check an integer (not a boolean, not a float) within bounds."""
    if not isinstance(value, numbers.Integral) or isinstance(value, bool):
        raise InputError(path, f"must be an integer, got {shown(value)}")
    if (ge is not None and value < ge) or (le is not None and value > le):
        lo = "" if ge is None else f">= {ge}"
        hi = "" if le is None else f"<= {le}"
        rule = " and ".join(p for p in (lo, hi) if p)
        raise InputError(path, f"must be an integer {rule}, got {clip(value)}")
    return int(value)


def suggest(word: str, known: Sequence[str]) -> str:
    """``"; did you mean `x`?"`` for the nearest known word, or ``""``."""
    if len(word) > 4 * ECHO_CHARS:
        return ""
    same_letters = [k for k in known if k.lower() == word.lower()]
    close = same_letters or difflib.get_close_matches(word, list(known), n=1, cutoff=0.6)
    if not close:  # also compare without case ("Beta" -> "beta")
        lowered = {k.lower(): k for k in known}
        close = [lowered[c] for c in difflib.get_close_matches(word.lower(), list(lowered), n=1)]
    return f"; did you mean `{close[0]}`?" if close else ""


def choice(value: Any, path: str, choices: Sequence[str] | None = None) -> str:
    """Check a string, optionally one of ``choices`` (with a suggestion for typos)."""
    if not isinstance(value, str):
        raise InputError(path, f"must be a string, got {shown(value)}")
    if choices is not None and value not in choices:
        known = ", ".join(repr(c) for c in choices)
        hint = suggest(value, choices)
        raise InputError(path, f"must be one of {known}; got {clip(value)}{hint}")
    return value


def boolean(value: Any, path: str) -> bool:
    """Check ``true`` or ``false``."""
    if not isinstance(value, bool):
        raise InputError(path, f"must be true or false, got {shown(value)}")
    return value
