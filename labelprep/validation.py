"""Argument checks shared by every stage, in the manner of scikit-learn's ``utils.validation``.

One rule for each kind of mistake, so that the same mistake gets the same error everywhere:

- a value of the wrong type (a list where a manifest goes, a string where a number goes) is a
  :class:`TypeError` naming the parameter and the type it got;
- a value of the right type outside what the option accepts is a
  :class:`~labelprep.errors.ParameterError` naming the parameter and the value;
- a manifest without a column the stage reads is an :class:`~labelprep.errors.InputError`:
  the file, not the call, is what is wrong (it was not made by the stage that adds the column).
"""

from __future__ import annotations

import numbers
import os

from .errors import InputError, ParameterError


def check_manifest(df, needed=(), *, name: str = "manifest", hint: str = ""):
    """Raise unless ``df`` is a DataFrame holding every column in ``needed``.

    Parameters
    ----------
    df : object
        What the caller passed as a manifest.
    needed : iterable of str
        The columns the stage reads.
    name : str
        The parameter's name, for the message (``manifest``, ``keep_from``).
    hint : str
        What to run to get the missing columns, appended to the message.

    Examples
    --------
    >>> import pandas as pd
    >>> check_manifest(pd.DataFrame({"path": []}), ["path"])
    >>> check_manifest(pd.DataFrame({"path": []}), ["path", "split"], hint="run labelprep split first")
    Traceback (most recent call last):
    ...
    labelprep.errors.InputError: manifest has no column 'split' (columns: path); run labelprep split first
    >>> check_manifest([1, 2], ["path"])
    Traceback (most recent call last):
    ...
    TypeError: manifest must be a pandas DataFrame, got list
    """
    import pandas as pd

    if not isinstance(df, pd.DataFrame):
        raise TypeError(f"{name} must be a pandas DataFrame, got {type(df).__name__}")
    missing = [c for c in needed if c not in df.columns]
    if missing:
        columns = ", ".join(map(str, df.columns)) or "none"
        noun = "column" if len(missing) == 1 else "columns"
        message = f"{name} has no {noun} {', '.join(map(repr, missing))} (columns: {columns})"
        raise InputError(f"{message}; {hint}" if hint else message)


def check_int(value, name: str, *, low=None, high=None, none: bool = False):
    """``value`` as an int, checked to lie in ``[low, high]``; None passes when ``none``.

    Examples
    --------
    >>> check_int(8, "max_distance", low=0, high=64)
    8
    >>> check_int(65, "max_distance", low=0, high=64)
    Traceback (most recent call last):
    ...
    labelprep.errors.ParameterError: max_distance must be from 0 to 64, got max_distance=65
    >>> check_int(True, "seed", low=0)
    Traceback (most recent call last):
    ...
    TypeError: seed must be an int, got bool
    """
    if value is None and none:
        return None
    if isinstance(value, bool) or not isinstance(value, numbers.Integral):
        raise TypeError(f"{name} must be an int{' or None' if none else ''}, got {type(value).__name__}")
    _check_range(value, name, low, high)
    return int(value)


def check_number(value, name: str, *, low=None, high=None, low_open: bool = False, none: bool = False):
    """``value`` as a float in ``[low, high]`` (``(low, high]`` when ``low_open``).

    Examples
    --------
    >>> check_number(0.5, "beta", low=0, high=1)
    0.5
    >>> check_number(0, "time_limit", low=0, low_open=True)
    Traceback (most recent call last):
    ...
    labelprep.errors.ParameterError: time_limit must be above 0, got time_limit=0
    """
    if value is None and none:
        return None
    if isinstance(value, bool) or not isinstance(value, numbers.Real):
        raise TypeError(f"{name} must be a number{' or None' if none else ''}, got {type(value).__name__}")
    if value != value:
        raise ParameterError(f"{name} must be a number, got {name}=nan")
    if low_open and value <= low:
        raise ParameterError(f"{name} must be above {low:g}, got {name}={value!r}")
    _check_range(value, name, None if low_open else low, high)
    return float(value)


def check_bool(value, name: str) -> bool:
    """``value`` itself when it is True or False.

    Examples
    --------
    >>> check_bool("yes", "force")
    Traceback (most recent call last):
    ...
    TypeError: force must be True or False, got str
    """
    if not isinstance(value, bool):
        raise TypeError(f"{name} must be True or False, got {type(value).__name__}")
    return value


def check_path(value, name: str, *, none: bool = False):
    """``value`` when it is a path (str or os.PathLike); None passes when ``none``.

    Examples
    --------
    >>> check_path(["out.json"], "json", none=True)
    Traceback (most recent call last):
    ...
    TypeError: json must be a path (str or Path), got list
    """
    if value is None and none:
        return None
    if not isinstance(value, (str, os.PathLike)):
        raise TypeError(f"{name} must be a path (str or Path), got {type(value).__name__}")
    return value


def check_choice(value, name: str, choices):
    """``value`` when it is one of ``choices``.

    Examples
    --------
    >>> check_choice("move", "mode", ("hardlink", "symlink", "copy"))
    Traceback (most recent call last):
    ...
    labelprep.errors.ParameterError: mode must be one of 'hardlink', 'symlink', 'copy', got mode='move'
    """
    if value not in choices:
        raise ParameterError(f"{name} must be one of {', '.join(map(repr, choices))}, got {name}={value!r}")
    return value


def _check_range(value, name, low, high):
    if low is not None and high is not None and not low <= value <= high:
        raise ParameterError(f"{name} must be from {low:g} to {high:g}, got {name}={value!r}")
    if low is not None and value < low:
        raise ParameterError(f"{name} must be {low:g} or more, got {name}={value!r}")
    if high is not None and value > high:
        raise ParameterError(f"{name} must be {high:g} or less, got {name}={value!r}")
