"""Chunked processing of masks larger than memory, on Dask (optional extra ``vesselgeom[chunked]``).

``analyze_chunked`` runs the single-mask pipeline chunk by chunk and returns the same tables as
:func:`vesselgeom.analyze`. Dask, distributed and zarr are imported only when needed, so importing this
package works without them. See ``docs/chunked.md``.
"""

from vesselgeom.chunked.run import analyze_chunked
from vesselgeom.chunked.sources import LazyVolume, open_lazy

__all__ = ["analyze_chunked", "LazyVolume", "open_lazy"]
