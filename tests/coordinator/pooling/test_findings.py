"""The findings sentences never print a number the analysis cannot know."""

from __future__ import annotations

import math

from coordinator.pooling.findings import _new_site


def test_two_sites_give_no_prediction_interval_instead_of_nan() -> None:
    """With k = 2 the t quantile has 0 df (Higgins et al. 2009): say so, never 'nan'."""
    text = _new_site(math.nan, math.nan, "95%")

    assert "nan" not in text
    assert "at least three sites" in text


def test_a_defined_prediction_interval_is_printed_to_three_places() -> None:
    """A finite interval is reported as computed."""
    assert _new_site(0.81234, 0.95678, "95%").endswith("0.812 to 0.957")
