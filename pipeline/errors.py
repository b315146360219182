"""The project's error and warning classes.

Every error a user can cause (configuration, rule files, input files, the store) is a
:class:`TowerflowError`, a ``ValueError`` whose message is one line naming the file and
the row, column or key at fault. The CLI prints ``str(error)`` and exits non-zero.
"""
from __future__ import annotations

import os
import warnings

__all__ = [
    "TowerflowError",
    "ConfigError",
    "RuleError",
    "InputError",
    "StoreError",
    "TowerflowWarning",
    "warn",
]


class TowerflowError(ValueError):
    """A user-facing error with a one-line message naming where it happened.

    Parameters
    ----------
    message : str
        What is wrong, in words a technician understands.
    file : str or os.PathLike, optional
        The file at fault.
    row : int, optional
        1-based line number in the file (header = line 1).
    column : str, optional
        Column name in the file.
    key : str, optional
        Dotted key in a TOML file (e.g. ``input.units.ta``).
    """

    def __init__(self, message: str, *, file=None, row=None, column=None, key=None):
        self.message = " ".join(str(message).split())
        self.file = os.fspath(file) if file is not None else None
        self.row = row
        self.column = column
        self.key = key
        super().__init__(self.__str__())

    def __str__(self) -> str:
        where = []
        if self.file is not None:
            where.append(str(self.file))
        if self.row is not None:
            where.append(f"row {self.row}")
        if self.column is not None:
            where.append(f"column {self.column!r}")
        if self.key is not None:
            where.append(f"key {self.key!r}")
        prefix = ", ".join(where)
        text = f"{prefix}: {self.message}" if prefix else self.message
        return " ".join(text.split())  # always one line


class ConfigError(TowerflowError):
    """A site or network configuration file is invalid."""


class RuleError(ConfigError):
    """A QC rule file is invalid."""


class InputError(TowerflowError):
    """A logger export cannot be read as declared."""


class StoreError(TowerflowError):
    """The site store refuses a change (conflict, clock reset, corruption, lock)."""


class TowerflowWarning(UserWarning):
    """A degraded mode or a suspicion the user should see (one class for the project)."""


def warn(message: str, *, stacklevel: int = 2) -> None:
    """Emit a one-line :class:`TowerflowWarning`."""
    warnings.warn(" ".join(str(message).split()), TowerflowWarning, stacklevel=stacklevel + 1)
