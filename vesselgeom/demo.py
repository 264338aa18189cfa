"""The built-in synthetic demo cohort and the ``vesselgeom demo`` run.

The scenario is invented: "Study VG-D1", a fictitious preclinical micro-CT study of cortical vessel
networks in ten mice, five given a vehicle and five a made-up "compound X". The masks are synthetic
networks (:func:`vesselgeom.phantoms.network_phantom`, 20 um voxels); the compound-X networks are built
more tortuous (lateral undulation of 0.6 radii instead of 0.15); vessel calibre varies between animals
(+-20 %) independently of the group, so radius is an unplanted contrast. Every number in the demo is
invented; no animal or patient data are involved.
"""

from __future__ import annotations

import os
from pathlib import Path

import nibabel as nib
import numpy as np
import pandas as pd

from .phantoms import network_phantom

__all__ = ["DEMO_GROUPS", "make_cohort", "find_or_make_cohort"]

DEMO_GROUPS = {"vehicle": 0.15, "compound-X": 0.6}  # group -> undulation amplitude in radii
_SHAPE = (128, 128, 128)
_VOXEL_MM = 0.02
_PER_GROUP = 5


def make_cohort(folder: str | os.PathLike[str], *, seed: int = 2026) -> Path:
    """Write the ten demo masks and ``manifest.csv`` into ``folder``; returns the manifest path.

    Deterministic for a given seed (same bytes on every machine with the same library versions).
    """
    folder = Path(folder)
    (folder / "masks").mkdir(parents=True, exist_ok=True)
    rng = np.random.default_rng(seed)
    rows = []
    n = 0
    for group, undulation in DEMO_GROUPS.items():
        for _ in range(_PER_GROUP):
            n += 1
            subject = f"{n:02d}"
            # vessel calibre varies between animals (+-20 %), independently of the group
            calibre = float(rng.uniform(0.8, 1.2))
            mask, affine = network_phantom(
                _SHAPE,
                spacing=(_VOXEL_MM,) * 3,
                n_trees=4,
                depth=5,
                radius_voxels=(2.0 * calibre, 4.0 * calibre),
                undulation_radii=undulation,
                seed=int(rng.integers(0, 2**31)),
            )
            img = nib.Nifti1Image(mask.astype(np.uint8), affine)
            img.header.set_xyzt_units("mm")
            img.set_sform(affine, code=1)
            img.set_qform(affine, code=1)
            rel = f"masks/sub-{subject}.nii.gz"
            nib.save(img, folder / rel)
            rows.append(
                {
                    "subject": subject,
                    "group": group,
                    "mask": rel,
                    "age_weeks": int(rng.integers(10, 15)),
                }
            )
    manifest = folder / "manifest.csv"
    pd.DataFrame(rows).to_csv(manifest, index=False, lineterminator="\n")
    return manifest


def find_or_make_cohort(out_dir: Path) -> tuple[Path, bool]:
    """The committed demo manifest of this source checkout, else an identical fresh copy in out_dir/data.

    Only the checkout the package itself lives in is looked at (an editable install); an installed
    package regenerates the cohort with the same seed. Returns (manifest path, whether generated now).
    """
    here = Path(__file__).resolve().parent.parent / "synthetic_data" / "cohort" / "manifest.csv"
    if here.is_file():
        return here, False
    return make_cohort(out_dir / "data"), True
