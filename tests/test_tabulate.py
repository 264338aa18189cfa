"""Tests for vesselgeom.tabulate.TableBuilder: batches give the same tables as one pass.

The reference is the pipeline's own output (:func:`vesselgeom.analyze`) with every branch in one
batch; splitting the tracing and measuring into batches of one or a few branches must not change a
value, since each branch's spline fit and measures depend on that branch alone.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

import vesselgeom as vg
from vesselgeom import pipeline
from vesselgeom.phantoms import network_phantom, y_phantom


@pytest.fixture(scope="module")
def masks():
    y = y_phantom()
    net_mask, net_aff = network_phantom((96, 96, 96), n_trees=3, depth=4, seed=1)
    return {"y": (y.mask, y.affine), "network": (net_mask, net_aff)}


@pytest.mark.parametrize("name", ["y", "network"])
@pytest.mark.parametrize("batch", [1, 2])
def test_batches_give_the_same_tables(masks, name, batch, monkeypatch):
    mask, affine = masks[name]
    whole = vg.analyze(mask, affine=affine)
    monkeypatch.setattr(pipeline, "_BATCH_BRANCHES", batch)
    split = vg.analyze(mask, affine=affine)
    assert len(whole.junctions) > 0 and len(whole.branches) > batch
    for a, b in (
        (whole.branches, split.branches),
        (whole.points, split.points),
        (whole.junctions, split.junctions),
    ):
        pd.testing.assert_frame_equal(a, b, check_exact=True)
    angles = whole.junctions["min_angle_deg"].to_numpy()
    assert np.all(np.isfinite(angles))  # every junction's branches were found across batches
