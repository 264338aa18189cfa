"""Write the built-in synthetic example mask (fixed seed); run from the repository root.

The scenario is invented: a vessel tree from a fictitious preclinical study, voxelised from analytic
tubes (straight branches with Murray's-law radii plus one coiled side vessel) on an anisotropic,
rotated grid. No real subject's data are involved.
"""

from __future__ import annotations

from pathlib import Path

import nibabel as nib
import numpy as np

from vesselgeom import phantoms as P

HERE = Path(__file__).resolve().parent


def example_tree() -> tuple[np.ndarray, np.ndarray]:
    """A depth-3 tree (7 branches) and a separate coiled vessel, 0.4 x 0.4 x 0.6 mm voxels.

    Radii (1.26-2.0 mm) are at least 2 voxels of the coarsest axis, the validated range.
    """
    tree = P.tree_phantom(3, root_radius_mm=2.0, root_length_mm=16.0, seed=3)
    coil = P.sample_curve(P.helix(4.0, 1.5, turns=1.5), 0.04) + np.array([14.0, 0.0, 4.0])
    polys = [P.sample_curve(c, 0.04) for c in tree.curves] + [coil]
    radii = [t.radius_mm for t in tree.branches] + [1.3]
    rot = P.random_rotation(11)
    affine, shape = P.make_grid_affine(
        np.concatenate(polys), spacing=(0.4, 0.4, 0.6), rotation=rot, margin_mm=3.0
    )
    return P.voxelize_tubes(polys, radii, affine, shape), affine


def main() -> None:
    mask, affine = example_tree()
    img = nib.Nifti1Image(mask.astype(np.uint8), affine)
    img.header.set_xyzt_units("mm")
    img.set_sform(affine, code=1)
    img.set_qform(affine, code=1)
    out = HERE / "example_tree.nii.gz"
    nib.save(img, out)
    print(f"wrote {out} {mask.shape} foreground={int(mask.sum())}")


if __name__ == "__main__":
    main()
