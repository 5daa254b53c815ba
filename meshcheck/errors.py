"""Exceptions raised by the meshcheck library.

The library never prints and never exits; the CLI maps these to one-line
messages and exit code 2.  Every message names the file (when there is one),
what is wrong and what to do about it.
"""
from __future__ import annotations

__all__ = ["MeshcheckError", "MeshReadError", "UnitsError", "SettingsError"]


class MeshcheckError(Exception):
    """Base class of every error meshcheck raises on purpose."""


class MeshReadError(MeshcheckError):
    """A mesh file cannot be read, or would be misread."""


class UnitsError(MeshcheckError):
    """The length unit of a mesh is missing and cannot be told from its size."""


class SettingsError(MeshcheckError):
    """An option or setting is out of range or inconsistent."""
