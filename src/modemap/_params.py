"""One parameter check for every estimator: constraints declared as data, checked at fit time.

An estimator lists what each of its parameters may be in a class attribute
``_parameter_constraints`` (a dict from the parameter's name to a list of allowed forms;
the value is valid when it fits any of them), in the spirit of scikit-learn's own
declarations, and calls :func:`check_params` at the start of ``fit``.  The forms are

* :class:`Interval` ``(int | float, low, high, closed="both")``: a number in a range
  (``None`` for an open end); ``int`` accepts NumPy integers and refuses ``bool``,
  ``float`` accepts any real number but NaN;
* :class:`Options` ``(values)``: one of a few values (strings, usually);
* ``None``: the value ``None``;
* a class: an instance of it (``str``, a sub-estimator's class, ...);
* :data:`SEQUENCE_OF_STR`: a list or tuple of strings;
* :data:`BOOLEAN`: ``True`` or ``False`` (NumPy's too).

A value that fits none raises :class:`~modemap._exceptions.ParameterError` naming the
estimator, the parameter, the value and what is allowed.  Functions check a single option
with :func:`check_value`.
"""

from __future__ import annotations

import math
import numbers
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np

from modemap._exceptions import ParameterError

__all__ = ["BOOLEAN", "SEQUENCE_OF_STR", "Interval", "Options", "check_params", "check_value"]


@dataclass(frozen=True)
class Interval:
    """A number of type ``kind`` between ``low`` and ``high`` (``None``: no bound)."""

    kind: type
    low: float | None = None
    high: float | None = None
    closed: str = "both"  # "both", "left", "right" or "neither"

    def accepts(self, value: Any) -> bool:
        if isinstance(value, bool | np.bool_):
            return False
        if self.kind is int:
            if not isinstance(value, numbers.Integral):
                return False
        elif not isinstance(value, numbers.Real) or math.isnan(float(value)):
            return False
        left = self.closed in ("both", "left")
        right = self.closed in ("both", "right")
        if self.low is not None and not (value >= self.low if left else value > self.low):
            return False
        return self.high is None or (value <= self.high if right else value < self.high)

    def __str__(self) -> str:
        what = "an integer" if self.kind is int else "a number"
        lo = "[" if self.closed in ("both", "left") else "("
        hi = "]" if self.closed in ("both", "right") else ")"
        fmt = "d" if self.kind is int else "g"  # integers in full: 4294967295, not 4.29e+09
        if self.low is None and self.high is None:
            return what
        if self.high is None:
            return f"{what} {'>=' if lo == '[' else '>'} {self.low:{fmt}}"
        if self.low is None:
            return f"{what} {'<=' if hi == ']' else '<'} {self.high:{fmt}}"
        return f"{what} in {lo}{self.low:{fmt}}, {self.high:{fmt}}{hi}"


@dataclass(frozen=True)
class Options:
    """One of ``values``."""

    values: tuple

    def accepts(self, value: Any) -> bool:
        try:
            return any(value == v and type(value) is type(v) for v in self.values) or (
                isinstance(value, str) and value in self.values
            )
        except (TypeError, ValueError):
            return False

    def __str__(self) -> str:
        return "one of " + ", ".join(repr(v) for v in self.values)


class _Marker:
    def __init__(self, name: str, test: Any) -> None:
        self.name, self.test = name, test

    def accepts(self, value: Any) -> bool:
        return bool(self.test(value))

    def __str__(self) -> str:
        return self.name


#: A list or tuple of strings.
SEQUENCE_OF_STR = _Marker(
    "a list of strings",
    lambda v: isinstance(v, list | tuple) and all(isinstance(s, str) for s in v),
)
#: True or False.
BOOLEAN = _Marker("True or False", lambda v: isinstance(v, bool | np.bool_))


def _accepts(form: Any, value: Any) -> bool:
    if form is None:
        return value is None
    if isinstance(form, type):
        return isinstance(value, form)
    return form.accepts(value)


def _describe(form: Any) -> str:
    if form is None:
        return "None"
    if isinstance(form, type):
        return f"a {form.__name__}"
    return str(form)


def check_value(value: Any, allowed: Sequence[Any], name: str, owner: str = "") -> Any:
    """Return ``value`` if it fits one of the ``allowed`` forms, else raise.

    Parameters
    ----------
    value : object
    allowed : sequence
        Forms as listed in the module notes.
    name : str
        The parameter's name, for the message.
    owner : str, default ""
        Who takes the parameter (an estimator's class name), for the message.

    Raises
    ------
    ParameterError
    """
    if any(_accepts(form, value) for form in allowed):
        return value
    expected = " or ".join(_describe(f) for f in allowed)
    where = f"{owner}: " if owner else ""
    error = ParameterError(f"{where}{name} must be {expected}, got {value!r}")
    error.param, error.expected, error.value = name, expected, value  # for front ends
    raise error


def _constraints(cls: type) -> dict[str, list]:
    merged: dict[str, list] = {}
    for klass in reversed(cls.__mro__):
        merged.update(getattr(klass, "_parameter_constraints", None) or {})
    return merged


def check_params(estimator: Any) -> None:
    """Check every declared parameter of ``estimator`` (see the module notes).

    Raises
    ------
    ParameterError
        For the first parameter whose value fits none of its forms.
    """
    owner = type(estimator).__name__
    for name, allowed in _constraints(type(estimator)).items():
        check_value(getattr(estimator, name), allowed, name, owner)
