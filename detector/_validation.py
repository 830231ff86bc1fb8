"""The one home of parameter checks, random state and JSON-safe values (the role
``sklearn/utils/validation.py`` plays in scikit-learn).

- :func:`check_int`, :func:`check_real`, :func:`check_choice`: a parameter from the user, checked,
  or one :class:`detector.errors.InputError` in one line (the project's one error type for bad
  input; it is a ``ValueError``, so callers that catch ``ValueError`` still do).
- :func:`seed_sequence`, :func:`as_generator`: any scikit-learn style ``random_state`` to a numpy
  ``SeedSequence`` or ``Generator``.
- :func:`json_safe`, :func:`finite_or_none`: numpy scalars, arrays and dataclasses to plain JSON
  values, NaN and infinities to ``None`` (JSON has no such numbers: RFC 8259, section 6).

This module sits in the lowest layer: it imports nothing from :mod:`detector` but the error type.
"""

from __future__ import annotations

import math
import numbers
from dataclasses import fields, is_dataclass
from typing import Any, Iterable

import numpy as np

from detector.errors import InputError

__all__ = ["check_int", "check_real", "check_choice", "seed_sequence", "as_generator",
           "json_safe", "finite_or_none"]


# --------------------------------------------------------------------------------------------
# parameters

def check_int(value: Any, name: str, *, low: int | None = None, high: int | None = None) -> int:
    """``value`` as an ``int`` if it is an integer (not a bool) in ``[low, high]``; the message
    words the range as :class:`detector.classifier.PatchClassifier` does ("1..12", ">= 1").

    Examples
    --------
    >>> check_int(np.int64(3), "top", low=1)
    3
    >>> check_int(0, "top", low=1)
    Traceback (most recent call last):
    ...
    detector.errors.InputError: top must be an integer >= 1, got 0
    >>> check_int(2.5, "k", low=0)
    Traceback (most recent call last):
    ...
    detector.errors.InputError: k must be an integer >= 0, got 2.5
    """
    ok = isinstance(value, numbers.Integral) and not isinstance(value, (bool, np.bool_))
    if ok and (low is None or value >= low) and (high is None or value <= high):
        return int(value)
    bound = _bound_words(low, high, lambda: f"{low}..{high}", fmt=str)
    raise InputError(f"{name} must be an integer{' ' + bound if bound else ''}, got {value!r}")


def check_real(value: Any, name: str, *, low: float | None = None, high: float | None = None,
               low_open: bool = False, high_open: bool = False) -> float:
    """``value`` as a finite ``float`` inside the interval the bounds give (closed unless
    ``low_open`` / ``high_open``).

    Examples
    --------
    >>> check_real("0.5", "the IoU threshold", low=0, high=1, low_open=True)
    0.5
    >>> check_real(0, "the IoU threshold", low=0, high=1, low_open=True)
    Traceback (most recent call last):
    ...
    detector.errors.InputError: the IoU threshold must be in (0, 1], got 0
    >>> check_real(float("nan"), "gamma", low=0, low_open=True)
    Traceback (most recent call last):
    ...
    detector.errors.InputError: gamma must be > 0, got nan
    """
    try:
        v = float(value)
    except (TypeError, ValueError):
        v = math.nan
    inside = math.isfinite(v)
    if low is not None:
        inside = inside and (v > low if low_open else v >= low)
    if high is not None:
        inside = inside and (v < high if high_open else v <= high)
    if inside:
        return v
    bound = _bound_words(
        low, high, lambda: f"in {'(' if low_open else '['}{low:g}, {high:g}{')' if high_open else ']'}",
        low_open, high_open)
    raise InputError(f"{name} must be {bound or 'a finite number'}, got {value}")


def _bound_words(low, high, both, low_open=False, high_open=False, fmt=lambda v: f"{v:g}"):
    """The range in a message: ``both()`` when both ends are given, else ``>= low`` or
    ``<= high`` (``>`` / ``<`` when open), else an empty string.

    >>> _bound_words(1, None, None, low_open=True), _bound_words(None, None, None)
    ('> 1', '')
    """
    if low is not None and high is not None:
        return both()
    if low is not None:
        return f"{'>' if low_open else '>='} {fmt(low)}"
    if high is not None:
        return f"{'<' if high_open else '<='} {fmt(high)}"
    return ""


def check_choice(value: Any, name: str, choices: Iterable[str]) -> str:
    """``value`` if it is one of ``choices``.

    Examples
    --------
    >>> check_choice("boosted", "mode", ("bagged", "boosted"))
    'boosted'
    >>> check_choice("adaptive", "mode", ("bagged", "boosted"))
    Traceback (most recent call last):
    ...
    detector.errors.InputError: mode must be one of bagged, boosted, got 'adaptive'
    """
    choices = tuple(choices)
    if isinstance(value, str) and value in choices:
        return value
    raise InputError(f"{name} must be one of {', '.join(choices)}, got {value!r}")


# --------------------------------------------------------------------------------------------
# random state

def seed_sequence(random_state: Any) -> np.random.SeedSequence:
    """A :class:`numpy.random.SeedSequence` from any scikit-learn style ``random_state``.

    Parameters
    ----------
    random_state : None, int, SeedSequence, Generator or RandomState
        None draws fresh entropy; an int gives a reproducible sequence; a generator is consumed
        once.

    Examples
    --------
    >>> seed_sequence(7).generate_state(1) == seed_sequence(7).generate_state(1)
    array([ True])
    >>> seed_sequence(-1)
    Traceback (most recent call last):
    ...
    detector.errors.InputError: random_state must be >= 0, got -1
    """
    if random_state is None:
        return np.random.SeedSequence()
    if isinstance(random_state, np.random.SeedSequence):
        return random_state
    if isinstance(random_state, numbers.Integral) and not isinstance(random_state, (bool, np.bool_)):
        if random_state < 0:
            raise InputError(f"random_state must be >= 0, got {random_state}")
        return np.random.SeedSequence(int(random_state))
    if isinstance(random_state, np.random.Generator):
        return np.random.SeedSequence(int(random_state.integers(0, 2**63)))
    if isinstance(random_state, np.random.RandomState):
        return np.random.SeedSequence(int(random_state.randint(0, 2**31 - 1)))
    raise InputError(f"random_state must be None, an int or a numpy generator, got {random_state!r}")


def as_generator(random_state: Any) -> np.random.Generator:
    """A :class:`numpy.random.Generator`: a generator given is used as it is (so successive calls
    continue its stream); anything else goes through :func:`seed_sequence`. An int gives the
    same stream as ``np.random.default_rng(int)`` (which seeds through a ``SeedSequence`` too).

    Examples
    --------
    >>> bool(as_generator(3).integers(1 << 30) == np.random.default_rng(3).integers(1 << 30))
    True
    >>> g = np.random.default_rng(0)
    >>> as_generator(g) is g
    True
    """
    if isinstance(random_state, np.random.Generator):
        return random_state
    return np.random.default_rng(seed_sequence(random_state))


# --------------------------------------------------------------------------------------------
# JSON-safe values

def finite_or_none(value: Any) -> float | None:
    """A JSON-ready float: ``None`` for None, values that are not numbers, NaN and infinity.

    Examples
    --------
    >>> finite_or_none(np.float32(0.5)), finite_or_none(float("inf")), finite_or_none("x")
    (0.5, None, None)
    """
    if value is None:
        return None
    try:
        v = float(value)
    except (TypeError, ValueError):
        return None
    return v if math.isfinite(v) else None


def json_safe(value: Any) -> Any:
    """Plain JSON values, recursively: dataclass instances to dicts (field order; a field whose
    metadata says ``{"json": False}`` is left out), dict keys to
    strings, tuples and arrays to lists, numpy scalars to Python, NaN and infinities to None.

    Examples
    --------
    >>> json_safe({"ap": np.float64(0.5), 1: (np.int32(2), np.nan), "ok": np.bool_(True)})
    {'ap': 0.5, '1': [2, None], 'ok': True}
    >>> json_safe(np.array([[1.0, np.inf]]))
    [[1.0, None]]
    """
    if is_dataclass(value) and not isinstance(value, type):
        return {f.name: json_safe(getattr(value, f.name)) for f in fields(value)
                if f.metadata.get("json", True)}
    if isinstance(value, dict):
        return {str(k): json_safe(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [json_safe(v) for v in value]
    if isinstance(value, np.ndarray):
        return json_safe(value.tolist())
    if isinstance(value, np.generic):
        value = value.item()
    if isinstance(value, float) and not math.isfinite(value):
        return None
    return value


def named_list(names, first: int = 5) -> str:
    """The first few names, and how many more.

    >>> named_list(["a.webp"]), named_list([f"{i}.txt" for i in range(7)], first=3)
    ('a.webp', '0.txt, 1.txt, 2.txt and 4 more')
    """
    shown = ", ".join(names[:first])
    return shown + (f" and {len(names) - first} more" if len(names) > first else "")
