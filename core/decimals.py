"""How many decimals a trait was recorded with, read off its values."""

from __future__ import annotations

import numpy as np
import pandas as pd

MAX_DECIMALS = 4


def recorded_decimals(values: pd.Series | np.ndarray) -> int:
    """The most decimals any value shows (0 for whole numbers), at most ``MAX_DECIMALS``.

    >>> recorded_decimals(pd.Series([5.2, 6.35, None]))
    2
    >>> recorded_decimals(pd.Series([59.0, 61.0]))
    0
    """
    observed = pd.Series(values, dtype=float).dropna().to_numpy()
    scale = max(1.0, float(np.abs(observed).max(initial=0.0)))
    for d in range(MAX_DECIMALS + 1):
        if np.allclose(observed, np.round(observed, d), rtol=0, atol=1e-9 * scale):
            return d
    return MAX_DECIMALS
