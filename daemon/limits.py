"""What a numeric setting may be: one rule object per kind of limit, one message per rule.

A setting's limit is written once, next to the constructor that owns the setting, as a table
``{key: Limit}`` (``Estimator.LIMITS``, ``ChangeControl.LIMITS``, ...). The constructor checks its
keyword arguments against that table with :func:`check_values` (messages name the config key,
``estimator.tau_s=-1.0 must be a positive finite number``), and the config section of the same
keys checks each field against the same table in a pydantic validator, which adds the file and
line. So a limit cannot differ between a value read from YAML and one passed in code.

This module sits at the bottom layer (beside records and errors) so that the core, the sockets,
the drivers and the config may all use it. It raises ``ValueError`` by default, the type pydantic
turns into a field error; callers that report bad user input otherwise pass ``error=``
(``InputError``, ``SourceError``).

Examples
--------
>>> POSITIVE.check("estimator.tau_s", 0.1)
0.1
>>> POSITIVE.problem(-1.0)
'must be a positive finite number'
>>> between(0, 1, low_open=True).problem(1.5)
'must be in (0, 1]'
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any, Mapping

__all__ = [
    "Limit",
    "POSITIVE",
    "NON_NEGATIVE",
    "FINITE",
    "at_least",
    "between",
    "check_values",
    "DB_LIMIT",
    "check_db",
]

#: Largest magnitude accepted for a dB setting (gap, budget, ceiling, margin): far beyond any
#: link, and small enough that every linear value stays a normal float.
DB_LIMIT = 300.0


@dataclass(frozen=True)
class Limit:
    """The range a numeric setting must lie in.

    Parameters
    ----------
    low, high : float
        Bounds (``-inf`` / ``+inf``: none).
    low_open, high_open : bool
        Exclude the bound itself.
    allow_inf : bool
        ``+inf`` passes (when ``high`` allows it); otherwise the value must be finite. NaN never
        passes.
    phrase : str
        The words after ``key=value`` in the message; generated from the bounds when empty.
    """

    low: float = -math.inf
    high: float = math.inf
    low_open: bool = False
    high_open: bool = False
    allow_inf: bool = False
    phrase: str = ""

    def problem(self, value: Any) -> str | None:
        """Why ``value`` is out of this limit (the phrase), or None when it is within."""
        try:
            v = float(value)
        except (TypeError, ValueError):
            return "must be a number"
        if math.isnan(v) or (math.isinf(v) and not (self.allow_inf and v > 0)):
            return self.phrase or self._describe()
        low_ok = v > self.low if self.low_open else v >= self.low
        high_ok = v < self.high if self.high_open else v <= self.high
        return None if (low_ok and high_ok) else (self.phrase or self._describe())

    def check(self, key: str, value: Any, error: type[Exception] = ValueError) -> Any:
        """Return ``value`` if within the limit, else raise ``error("key=value phrase")``."""
        problem = self.problem(value)
        if problem is not None:
            raise error(f"{key}={value} {problem}")
        return value

    def _describe(self) -> str:
        inf = " (or .inf)" if self.allow_inf else ""
        if math.isfinite(self.low) and math.isfinite(self.high):
            left = "(" if self.low_open else "["
            right = ")" if self.high_open else "]"
            return f"must be in {left}{self.low:g}, {self.high:g}{right}"
        if math.isfinite(self.low):
            return f"must be {'>' if self.low_open else '>='} {self.low:g}{inf}"
        if math.isfinite(self.high):
            return f"must be {'<' if self.high_open else '<='} {self.high:g}"
        return "must be finite"


#: Greater than 0 and finite (time constants, rates, intervals).
POSITIVE = Limit(low=0.0, low_open=True, phrase="must be a positive finite number")
#: 0 or more, finite (dwell times, weights in standard deviations, where 0 turns a feature off).
NON_NEGATIVE = Limit(low=0.0, phrase="must be a finite number >= 0")
#: Any finite number (margins in dB that may be negative).
FINITE = Limit(phrase="must be finite")


def at_least(low: float, *, allow_inf: bool = False) -> Limit:
    """``low`` or more (counts such as ``hwm >= 1``; ``allow_inf``: ``.inf`` passes too)."""
    return Limit(low=low, allow_inf=allow_inf)


def between(low: float, high: float, *, low_open: bool = False,
            high_open: bool = False) -> Limit:
    """Within ``[low, high]``, either end excluded on request (``(0, 1]``: ``low_open=True``)."""
    return Limit(low=low, high=high, low_open=low_open, high_open=high_open)


def check_values(values: Mapping[str, Any], limits: Mapping[str, Limit], *, prefix: str = "",
                 error: type[Exception] = ValueError) -> None:
    """Check every ``values[key]`` that ``limits`` names, in the table's order.

    Parameters
    ----------
    values : mapping
        Setting name -> value (a constructor's keyword arguments).
    limits : mapping of str to Limit
        The owner's table.
    prefix : str
        Put before each key in messages: the config section (``"estimator."``).
    error : exception class
        Raised with ``"prefix+key=value phrase"`` for the first value out of its limit.
    """
    for key, limit in limits.items():
        if key in values:
            limit.check(prefix + key, values[key], error)


def check_db(key: str, value: Any, *, allow_pos_inf: bool = False,
             error: type[Exception] = ValueError) -> float:
    """A dB setting as a float: finite (or ``+inf`` when ``allow_pos_inf``), within +-DB_LIMIT.

    Raises
    ------
    error
        ``key=value must be a number in dB`` / ``must be finite`` / ``must be finite or +inf``
        / ``is beyond +-300 dB``.
    """
    try:
        v = float(value)
    except (TypeError, ValueError):
        raise error(f"{key}={value!r} must be a number in dB") from None
    if math.isnan(v) or v == -math.inf or (v == math.inf and not allow_pos_inf):
        what = "finite or +inf" if allow_pos_inf else "finite"
        raise error(f"{key}={value!r} must be {what}")
    if math.isfinite(v) and abs(v) > DB_LIMIT:
        raise error(f"{key}={value!r} is beyond +-{DB_LIMIT:g} dB")
    return v
