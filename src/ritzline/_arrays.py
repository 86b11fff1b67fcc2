"""Small array helpers for the hot paths (cheaper than numpy's general-purpose versions)."""

from __future__ import annotations

import numpy as np


def _cat(*parts):
    """Concatenate scalars and 1-D arrays (a cheaper ``np.r_`` for short hot-path joins)."""
    return np.concatenate([np.atleast_1d(p) for p in parts])


def _median(x):
    """Median of a non-empty 1-D array of finite values.

    The same value as ``np.median``, without its general-axis machinery (several times its
    partition cost on the short arrays of the hot path).
    """
    k = x.size // 2
    part = np.partition(x, k)
    if x.size % 2:
        return part[k]
    # The lower middle value is the largest of the lower part (cheaper than a second kth).
    return 0.5 * (part[:k].max() + part[k])


