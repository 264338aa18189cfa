"""Tests for vesselgeom.cohort.figures.metric_figure.

External references: the PNG is read back with ``matplotlib.image.imread`` (an independent PNG decoder
path from the Agg writer), and its size is checked against matplotlib's documented rule
pixels = figure size (inches) x dpi, i.e. 4 x 3.5 in at 120 dpi = 480 x 420 px.
"""

from __future__ import annotations

import matplotlib.image as mpimg
import numpy as np
import pandas as pd
import pytest

from vesselgeom.cohort.figures import metric_figure
from vesselgeom.errors import InputError


def _subjects() -> pd.DataFrame:
    rng = np.random.default_rng(2)
    return pd.DataFrame(
        {
            "subject": [f"s{i:02d}" for i in range(11)],
            "group": ["01"] * 6 + ["02"] * 5,
            "distance_metric__lw_mean": np.r_[rng.normal(1.3, 0.1, 6), rng.normal(1.1, 0.1, 5)],
        }
    )


def test_png_written_with_expected_size_and_content(tmp_path):
    out = metric_figure(
        _subjects(), by="group", metric="distance_metric__lw_mean", path=tmp_path / "m.png", title="Distance"
    )
    assert out == tmp_path / "m.png" and out.is_file()
    img = mpimg.imread(out)
    assert img.shape[:2] == (420, 480)  # rows x columns = 3.5 in x 120 dpi, 4 in x 120 dpi
    gray = img[..., :3].mean(axis=2)
    assert gray.std() > 0.01  # not a uniform image
    assert (gray < 0.5).mean() > 0.002  # dark pixels: axes, boxes, text were drawn on the white background


def test_same_table_same_pixels(tmp_path):
    # Deterministic jitter: two renderings of the same table decode to identical pixels.
    a = metric_figure(_subjects(), by="group", metric="distance_metric__lw_mean", path=tmp_path / "a.png")
    b = metric_figure(_subjects(), by="group", metric="distance_metric__lw_mean", path=tmp_path / "b.png")
    np.testing.assert_array_equal(mpimg.imread(a), mpimg.imread(b))


def test_missing_folder_is_an_input_error(tmp_path):
    with pytest.raises(InputError, match="does not exist"):
        metric_figure(
            _subjects(), by="group", metric="distance_metric__lw_mean", path=tmp_path / "no" / "m.png"
        )
