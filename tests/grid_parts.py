"""Shared by the reference tests: where a frequency-severity grid changes its bucket."""
from __future__ import annotations

import math


def grid_parts(model, a: float, b: float, occ_attachment: float = 0.0, occ_limit: float = math.inf) -> list:
    """[(lo, hi, bucket)]: the interval [a, b] cut where the model's grid changes bucket.

    Grid error bounds are local: each part of a layer is held to the bound for
    the bucket the grid has there (``FrequencySeverity.resolution``).
    """
    res = model.resolution(occ_attachment, occ_limit)
    ends = [start for start, _ in res[1:]] + [math.inf]
    out = [(max(a, start), min(b, end), h) for (start, h), end in zip(res, ends) if min(b, end) > max(a, start)]
    return out or [(a, b, res[-1][1] if a >= res[-1][0] else res[0][1])]
