"""The exception hierarchy of cabletree.

Every error raised on purpose by the package derives from :class:`CableTreeError`,
so a caller can catch all of them at once, and each stage has its own subclass so a
caller can tell a bad file from a numerical failure.  Messages say what was wrong,
where (file, line, key or compartment) and what was expected.
"""

from __future__ import annotations

__all__ = [
    "CableTreeError",
    "MorphologyError",
    "SwcFormatError",
    "GridError",
    "ChannelError",
    "ProfileError",
    "InputError",
    "CellModelError",
    "SolverError",
    "NumericalInstabilityError",
    "ResultsError",
    "ScenarioError",
    "SweepError",
]


class CableTreeError(Exception):
    """Base class of every error raised by cabletree."""


class MorphologyError(CableTreeError, ValueError):
    """A morphology is structurally invalid (cycle, missing parent, bad radius, ...)."""


class SwcFormatError(MorphologyError):
    """An SWC file could not be parsed; the message names the file and line.

    Attributes
    ----------
    path : str or None
        The file that was being read.
    line_number : int or None
        1-based line number of the offending line.
    """

    def __init__(self, message: str, path: str | None = None, line_number: int | None = None):
        where = ""
        if path is not None:
            where = f"{path}"
            if line_number is not None:
                where += f", line {line_number}"
            where += ": "
        super().__init__(where + message)
        self.path = path
        self.line_number = line_number


class GridError(CableTreeError, ValueError):
    """A spacing rule or compartment grid is invalid."""


class ChannelError(CableTreeError, ValueError):
    """A channel model or gate definition is invalid."""


class ProfileError(CableTreeError, ValueError):
    """A density profile or selector is invalid or placements conflict."""


class InputError(CableTreeError, ValueError):
    """A current injection, synapse or event train is invalid."""


class CellModelError(CableTreeError, ValueError):
    """A cell model cannot be assembled from the given parts."""


class SolverError(CableTreeError, RuntimeError):
    """The solver was configured wrongly or failed."""


class NumericalInstabilityError(SolverError):
    """The membrane potential became NaN or ran away.

    Attributes
    ----------
    time_ms : float
        Simulation time at which the problem was detected, ms.
    compartment : int
        Index of the first offending compartment.
    """

    def __init__(self, message: str, time_ms: float, compartment: int):
        super().__init__(message)
        self.time_ms = time_ms
        self.compartment = compartment


class ResultsError(CableTreeError, ValueError):
    """A results Dataset is malformed or cannot be written/read."""


class ScenarioError(CableTreeError, ValueError):
    """A scenario file is invalid; the message names the file and the key path."""


class SweepError(CableTreeError, RuntimeError):
    """A sweep is misconfigured or some of its runs failed."""
