"""Exceptions and warnings raised by vesselgeom.

Every error carries a one-line message that names the input and the problem, so the command line can print
it without a traceback. They subclass built-in exceptions so callers can catch them generically.
"""

from __future__ import annotations

__all__ = ["VesselgeomError", "InputError", "AffineError", "VesselgeomWarning"]


class VesselgeomError(Exception):
    """Base class for every error vesselgeom raises on purpose."""


class InputError(VesselgeomError, ValueError):
    """The input mask (file or array) cannot be analysed as given."""


class AffineError(InputError):
    """The voxel-to-world affine is not finite or not invertible."""


class VesselgeomWarning(UserWarning):
    """A recoverable problem with the input or a measurement (recorded in run.json)."""
