"""Tail probabilities and quantiles of the reference distributions, from `scipy.special`.

`scipy.stats` gives the same numbers but took about 1.2 s to import on these machines,
more than a whole quick fit; the `scipy.special` functions below are what it calls. Even
`scipy.special` costs about 0.4 s, so it is imported on first use, after the data pass,
not at start-up (the app paints its first screen before any p-value is needed).
"""

from __future__ import annotations

import numpy as np
from numpy.typing import ArrayLike, NDArray


def t_sf(x: ArrayLike, df: float) -> NDArray[np.float64]:
    """Upper tail P(T > x) of Student's t with `df` degrees of freedom, elementwise."""
    from scipy import special

    return np.asarray(special.stdtr(df, -np.asarray(x, dtype=np.float64)), dtype=np.float64)


def t_ppf(q: float, df: float) -> float:
    """Quantile of Student's t with `df` degrees of freedom."""
    from scipy import special

    return float(special.stdtrit(df, q))


def f_sf(x: float, df1: float, df2: float) -> float:
    """Upper tail P(F > x) of the F distribution with (`df1`, `df2`) degrees of freedom."""
    from scipy import special

    return float(special.fdtrc(df1, df2, x))


def chi2_sf(x: float, df: float) -> float:
    """Upper tail P(X > x) of the chi-squared distribution with `df` degrees of freedom."""
    from scipy import special

    return float(special.chdtrc(df, x))


def norm_sf(x: float) -> float:
    """Upper tail P(Z > x) of the standard normal distribution."""
    from scipy import special

    return float(special.ndtr(-x))
