"""Error classes shared by every layer.

`InputError` is the one a user can act on: bad catalog, bad unit, bad period,
bad selection file. The command line turns it into a one-line message and
exit status 2. Anything else is a bug and keeps its traceback.
"""

from __future__ import annotations

__all__ = ["InputError", "CatalogError", "UnitError", "SelectionError", "ReplayMismatch",
           "LevelOutsideCurveWarning"]


class InputError(ValueError):
    """Bad input that the user can fix; the message names the file, field and value."""


class CatalogError(InputError):
    """A catalog file that does not validate."""


class UnitError(InputError):
    """A unit that cannot be parsed, or has the wrong dimension for its component."""


class SelectionError(InputError):
    """A selection file that is malformed or refers to something that does not exist."""


class ReplayMismatch(Exception):
    """Replay recomputed different numbers (or a source file changed)."""

    def __init__(self, message: str, table: str = ""):
        super().__init__(message)
        self.table = table


class LevelOutsideCurveWarning(UserWarning):
    """A water level lies outside its water body's storage curve: the months it affects are left empty
    (NaN), never extrapolated; the message names the water body and the months."""
