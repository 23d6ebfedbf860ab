"""Exceptions shared across schedforge.

Bad input (a spec file, a CSV file, a command-line argument) is *raised* as
:class:`InputError`, which names the offending field and the rule it broke; the
command-line interface turns it into a message and exit status 2.  Numerical
failure is *returned* in a result's ``status`` and ``message``, never raised.
"""

from __future__ import annotations

__all__ = ["InputError", "SteadyStateError"]


class InputError(ValueError):
    """Invalid user input.

    Parameters
    ----------
    field : str
        Dotted path of the offending field, e.g. ``"schedule.k_end"`` or
        ``"device.curves: line 7"``.
    rule : str
        What the value must satisfy, phrased so that ``f"{field} {rule}"`` reads
        as a sentence, e.g. ``"must be an integer >= 0, got -1"``.
    """

    #: Longest field and rule kept (a message never echoes a huge value whole).
    MAX_FIELD_CHARS = 300
    MAX_RULE_CHARS = 2000

    def __init__(self, field: str, rule: str) -> None:
        field, rule = str(field), str(rule)
        if len(field) > self.MAX_FIELD_CHARS:
            field = field[: self.MAX_FIELD_CHARS - 3] + "..."
        if len(rule) > self.MAX_RULE_CHARS:
            rule = rule[: self.MAX_RULE_CHARS - 3] + "..."
        self.field = field
        self.rule = rule
        super().__init__(f"`{field}` {rule}")


class SteadyStateError(InputError):
    """The final generator has no unique steady state, so the error is undefined."""
