"""The package's exceptions; each carries the exit code the command line uses for it."""

from __future__ import annotations


class LabelprepError(Exception):
    """Base of every error labelprep raises on purpose; ``str()`` is one line for the user."""

    exit_code = 2


class InputError(LabelprepError):
    """A file, folder or table given by the user cannot be used as it is."""


class ParameterError(LabelprepError, ValueError):
    """An option has a value outside what it accepts."""


class OutputExistsError(LabelprepError):
    """An output path holds something labelprep did not write; pass ``force`` to replace it."""


class GateFailed(LabelprepError):
    """The data failed a gate the user asked for (``--fail-on``)."""

    exit_code = 1
