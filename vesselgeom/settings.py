"""One frozen settings object carrying every tunable of the pipeline, with documented defaults.

Lengths that must follow the image's resolution are given in voxels or in local vessel radii, never as
absolute millimetres, so one set of defaults serves CT angiography (0.5 mm voxels) and light-sheet
microscopy (5 um voxels) alike. ``docs/validation.md`` shows the accuracy these defaults reach.
"""

from __future__ import annotations

import dataclasses
from dataclasses import dataclass
from typing import Any

__all__ = ["Settings"]


@dataclass(frozen=True)
class Settings:
    """Every tunable of ``vesselgeom.analyze``.

    Attributes
    ----------
    label : int or None
        For integer label maps, analyse only voxels equal to this label. None: every non-zero voxel.
    threshold : float or None
        For non-binary images (probability maps), foreground is ``value >= threshold``. Required for
        float images whose values are not just 0 and 1.
    fill_holes : bool
        Fill internal cavities (background fully enclosed by foreground) before thinning. Default True:
        cavities are segmentation artefacts and make thinning produce spurious loops.
    min_component_voxels : float
        Connected components (26-connectivity) smaller than this many voxels are dropped. Default 27
        (a 3x3x3 cube): a component that small cannot hold a branch measurable to the stated accuracy.
    min_component_mm3 : float or None
        Same, in mm^3; when set it replaces ``min_component_voxels``.
    prune_ratio : float
        A terminal branch is a spur, and removed, when its length from the junction centre to its tip is
        below ``prune_ratio`` times the radius at the junction. Default 1.5 (METHODS: 1-2 x radius,
        Palagyi et al. 2006). Pruning repeats to a fixed point.
    recentre_passes : int
        Passes of cross-section recentring (centroid of the mask in the plane normal to the tangent).
        Default 2.
    smoothing_radii : float
        Smoothing length of the penalised quintic spline that gives the centreline, its frame and its
        curvature, in units of ``max(radius, min_scale_voxels)`` (the scale); the spline filters out
        undulations shorter than twice this length. Default 2.5: the largest curvature error over the
        validation phantoms is then about 1 % (``docs/validation.md``).
    torsion_smoothing_radii : float
        Smoothing length of a second, smoother fit of the same points from which torsion is taken
        (torsion needs the third derivative, whose noise grows fastest as smoothing shrinks). Default
        5.0: helix torsion within about 3 % at 2-voxel radii (``docs/validation.md``).
    min_scale_voxels : float
        Lower bound, in voxels (mean voxel size), on the scale used for smoothing and end trimming, so
        thin vessels are still smoothed over several voxels. Default 2.0.
    step_voxels : float or None
        Arc-length resampling step of the output profiles, in voxels (mean voxel size). Default 0.5.
    step_mm : float or None
        Resampling step in mm; when set it replaces ``step_voxels``.
    end_trim_radii : float
        Both ends of every branch are left out of the curvature, torsion and radius summaries over this
        many smoothing scales (about a radius): a junction distorts the centreline for about a radius,
        and a spline is least constrained at its ends. Terminal ends are trimmed in addition by the
        length extrapolated to undo thinning's retraction. Default 1.0.
    curvature_floor_per_voxel : float
        Curvature noise floor, per voxel (i.e. divided by the mean voxel size in mm gives 1/mm). Torsion
        is reported as NaN where curvature is below it. Default 0.01 (measured on straight tubes, see
        ``docs/validation.md``).
    inflection_dip : float
        A curvature minimum counts as an inflection when it is below this fraction of both neighbouring
        maxima and the binormals at those maxima point in opposite directions. Default 0.5.
    inflection_end_radii : float
        Minima within this many radii of a branch end are not counted. Default 2.0.
    junction_cut_radii : float
        Centreline points closer to a junction than its radius plus this many scales are left out of
        the fit, and the branch is joined to the junction by a straight stub along its end tangent: the
        junction region (the union of several vessels) pulls every branch towards the others. Default
        1.0; 0 disables the cut.
    min_validated_radius_voxels : float
        Branches whose mean radius is below this many voxels (of the coarsest voxel axis) get the flag
        ``radius_below_validated``: below it the accuracy in ``docs/validation.md`` has not been shown.
        Default 2.0.
    junction_angle_radii : float
        Directions of branches leaving a junction are their tangents this many smoothing scales (about
        a radius) along each branch from the junction. Default 2.0 (METHODS: tangents 1-3 radii away).
    """

    label: int | None = None
    threshold: float | None = None
    fill_holes: bool = True
    min_component_voxels: float = 27.0
    min_component_mm3: float | None = None
    prune_ratio: float = 1.5
    recentre_passes: int = 2
    smoothing_radii: float = 2.5
    torsion_smoothing_radii: float = 5.0
    min_scale_voxels: float = 2.0
    step_voxels: float = 0.5
    step_mm: float | None = None
    end_trim_radii: float = 1.0
    curvature_floor_per_voxel: float = 0.01
    inflection_dip: float = 0.5
    inflection_end_radii: float = 2.0
    junction_angle_radii: float = 2.0
    min_validated_radius_voxels: float = 2.0
    junction_cut_radii: float = 1.0

    def __post_init__(self) -> None:
        positive = [
            "min_component_voxels",
            "prune_ratio",
            "smoothing_radii",
            "torsion_smoothing_radii",
            "min_scale_voxels",
            "step_voxels",
            "inflection_end_radii",
            "junction_angle_radii",
        ]
        for name in positive:
            value = getattr(self, name)
            if not (isinstance(value, int | float) and value > 0):
                raise ValueError(f"settings: {name} must be a positive number, got {value!r}")
        for name in ("min_component_mm3", "step_mm"):
            value = getattr(self, name)
            if value is not None and not value > 0:
                raise ValueError(f"settings: {name} must be positive or None, got {value!r}")
        if self.label is not None and self.threshold is not None:
            raise ValueError("settings: give either label or threshold, not both")
        if not 0 <= self.inflection_dip < 1:
            raise ValueError(f"settings: inflection_dip must be in [0, 1), got {self.inflection_dip}")
        if self.recentre_passes < 0:
            raise ValueError(f"settings: recentre_passes must be >= 0, got {self.recentre_passes}")

    def to_dict(self) -> dict[str, Any]:
        """Plain dict of every field, for run.json."""
        return dataclasses.asdict(self)

    def replace(self, **changes: Any) -> Settings:
        """A copy with some fields changed."""
        return dataclasses.replace(self, **changes)
