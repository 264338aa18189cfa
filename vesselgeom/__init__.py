"""vesselgeom: centreline geometry of 3D vessel masks, in millimetres.

Research software: not a medical device; not for diagnosis or treatment decisions.

Examples
--------
>>> import vesselgeom
>>> from vesselgeom.phantoms import helix, tube_phantom
>>> ph = tube_phantom(helix(turns=1), 2.0)
>>> result = vesselgeom.analyze(ph.mask, affine=ph.affine)
>>> sorted(result.branches.columns)[:3]
['branch_id', 'chord_mm', 'component_id']
"""

from __future__ import annotations

from importlib.metadata import PackageNotFoundError, version

try:
    __version__ = version("vesselgeom")
except PackageNotFoundError:  # running from a source tree that is not installed
    __version__ = "0.0.0+unknown"

from .errors import AffineError, InputError, VesselgeomError, VesselgeomWarning  # noqa: E402
from .pipeline import CAUTION, Result, analyze  # noqa: E402
from .settings import Settings  # noqa: E402

__all__ = [
    "__version__",
    "analyze",
    "Result",
    "Settings",
    "CAUTION",
    "VesselgeomError",
    "InputError",
    "AffineError",
    "VesselgeomWarning",
]
