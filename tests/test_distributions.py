"""Reference distributions against scipy.special and mpmath as oracles.

Each check names its oracle. Relative error is asserted where the oracle's value is at
least 1e-300; below that both sides must be 0 or tiny (underflow, as in scipy).
"""

from __future__ import annotations

import math
import subprocess
import sys

import mpmath
import numpy as np
import pytest
from scipy import special

from triage.core.distributions import chi2_sf, f_sf, norm_sf, t_ppf, t_sf

DFS = [1.0, 2.0, 2.5, 5.0, 10.0, 30.0, 100.0, 1e3, 1e5, 2e7, 1e9]
RTOL = 1e-10
T_STATS = [1e-8, 0.1, 0.5, 1.0, 1.5, 1.75, 2.0, 3.0, 5.0, 10.0, 20.0, 37.0, 100.0, 1e3]
T_STATS += [1e5, 1e10, 1e50, 1e100, 1e150, 1e300]
F_STATS = [1e-10, 1e-3, 0.1, 0.5, 0.9, 0.99, 1.0, 1.01, 1.1, 1.5, 2.0, 3.0, 5.0, 10.0]
F_STATS += [30.0, 100.0, 1e3, 1e5, 1e10, 1e50, 1e200]
# scipy.special.fdtrc itself is off by 1e-10 to 3e-8 for these (df1, df2) pairs, as
# measured against mpmath at 40 digits; they are checked against mpmath below instead.
F_SCIPY_INACCURATE = {(s, b) for s in (10.0, 30.0) for b in (2e7, 1e9)}
F_SCIPY_INACCURATE |= {(b, s) for s, b in F_SCIPY_INACCURATE}


def assert_close(ours: float, oracle: float, context: object) -> None:
    if oracle >= 1e-300:
        assert abs(ours - oracle) <= RTOL * oracle, (context, ours, oracle)
    else:
        assert 0.0 <= ours < 1e-290, (context, ours, oracle)


@pytest.mark.parametrize("df", [df for df in DFS if df != 1.0])
def test_t_sf_matches_scipy_stdtr(df: float) -> None:
    stats = np.array([0.0, *T_STATS, *(-s for s in T_STATS[:8])])
    ours = t_sf(stats, df)
    oracle = special.stdtr(df, -stats)  # oracle: scipy.special.stdtr
    assert ours.dtype == np.float64
    for stat, value, expected in zip(stats, ours, oracle, strict=True):
        assert_close(float(value), float(expected), (df, stat))


def test_t_sf_with_one_df_matches_the_cauchy_closed_form() -> None:
    # oracle: P(T > t) = atan(1/t)/π for t > 0, the Cauchy tail (closed form, from memory);
    # scipy's stdtr is off by 3e-9 at t = 1e-8 and underflows at t = 1e200, so not used here.
    stats = np.array(T_STATS)
    ours = t_sf(stats, 1.0)
    for stat, value in zip(stats, ours, strict=True):
        assert_close(float(value), math.atan(1.0 / stat) / math.pi, stat)
    assert t_sf(-2.0, 1.0) == pytest.approx(1.0 - math.atan(0.5) / math.pi, rel=RTOL)


def test_t_sf_is_elementwise_and_keeps_the_shape() -> None:
    stats = np.array([[0.0, 2.0], [np.inf, -np.inf], [np.nan, -2.0]])
    ours = t_sf(stats, 12.0)
    assert ours.shape == (3, 2)
    oracle = special.stdtr(12.0, -stats)  # oracle: scipy.special.stdtr, NaN included
    np.testing.assert_allclose(ours, oracle, rtol=RTOL, equal_nan=True)
    assert ours[0, 0] == 0.5 and ours[1, 0] == 0.0 and ours[1, 1] == 1.0


@pytest.mark.parametrize("df", DFS)
def test_t_ppf_matches_scipy_stdtrit(df: float) -> None:
    for q in [1e-12, 1e-6, 0.001, 0.025, 0.3, 0.5, 0.7, 0.975, 0.999, 1.0 - 1e-9]:
        expected = float(special.stdtrit(df, q))  # oracle: scipy.special.stdtrit
        assert t_ppf(q, df) == pytest.approx(expected, rel=RTOL, abs=0.0), (df, q)


def test_t_ppf_special_cases() -> None:
    # by the definition of the quantile function: the limits at 0 and 1, NaN outside [0, 1]
    # (scipy's stdtrit returns +inf at q = 0, so it is not the oracle here)
    assert t_ppf(0.0, 5.0) == -math.inf
    assert t_ppf(1.0, 5.0) == math.inf
    assert math.isnan(t_ppf(1.5, 5.0)) and math.isnan(special.stdtrit(5.0, 1.5))
    assert math.isnan(t_ppf(math.nan, 5.0))
    # oracle: with 2 df the quantile is (2q - 1) / sqrt(2 q (1 - q)) (closed form, from memory)
    q = 1e-300
    assert t_ppf(q, 2.0) == pytest.approx(-1.0 / math.sqrt(2.0 * q), rel=RTOL)


@pytest.mark.parametrize("df1", DFS)
def test_f_sf_matches_scipy_fdtrc(df1: float) -> None:
    for df2 in DFS:
        if (df1, df2) in F_SCIPY_INACCURATE:
            continue
        for stat in F_STATS:
            expected = float(special.fdtrc(df1, df2, stat))  # oracle: scipy.special.fdtrc
            assert_close(f_sf(stat, df1, df2), expected, (df1, df2, stat))


def mpmath_f_sf(stat: float, df1: float, df2: float) -> float:
    """P(F > stat) = I_x(df2/2, df1/2), x = df2 / (df2 + df1 stat), in 40-digit mpmath."""
    with mpmath.workdps(40):
        d1, d2, f = mpmath.mpf(df1), mpmath.mpf(df2), mpmath.mpf(stat)
        a, b = d2 / 2, d1 / 2
        x = d2 / (d2 + d1 * f)
        if x < a / (a + b):
            return float(mpmath.betainc(a, b, 0, x, regularized=True))
        return float(mpmath.betainc(b, a, d1 * f / (d2 + d1 * f), 1, regularized=True))


@pytest.mark.parametrize(("df1", "df2"), sorted(F_SCIPY_INACCURATE))
def test_f_sf_matches_mpmath_where_scipy_drifts(df1: float, df2: float) -> None:
    for stat in [0.5, 0.9, 1.01, 1.1, 1.5, 2.0, 3.0, 5.0, 10.0, 30.0]:
        expected = mpmath_f_sf(stat, df1, df2)  # oracle: mpmath.betainc at 40 digits
        assert_close(f_sf(stat, df1, df2), expected, (df1, df2, stat))


def mpmath_chi2_sf_below_mean(stat: float, df: float) -> float:
    """1 - P(X <= stat) for stat below the mean, by 30-digit mpmath quadrature of the density."""
    with mpmath.workdps(30):
        a, x = mpmath.mpf(df) / 2, mpmath.mpf(stat) / 2
        log_norm = mpmath.loggamma(a)

        def density(t: mpmath.mpf) -> mpmath.mpf:
            return mpmath.exp((a - 1) * mpmath.log(t) - t - log_norm)

        sd = mpmath.sqrt(a)
        start = max(x - 60 * sd, mpmath.mpf(0))
        inner = [x - k * sd for k in (30, 15, 8, 4, 2, 1, 0.5) if x - k * sd > start]
        return float(1 - mpmath.quad(density, [start, *inner, x]))


@pytest.mark.parametrize("df", DFS)
def test_chi2_sf_matches_scipy_chdtrc(df: float) -> None:
    stats = [1e-10, 1e-3, 0.1, 0.5, 1.0, 2.0, 5.0, 10.0, 30.0, 100.0, 300.0, 1000.0, 1400.0]
    stats += [m * df for m in (1e-6, 1e-3, 0.1, 0.5, 0.9, 0.99, 1.0, 1.01, 1.1, 1.5, 2.0, 10.0)]
    stats += [df + k * math.sqrt(2.0 * df) for k in (-5.0, -1.0, 1.0, 5.0, 20.0, 36.0)]
    for stat in (s for s in stats if s > 0.0):
        if df >= 2e7 and df * 0.99 <= stat < df:
            # scipy's chdtrc loses up to 2e-7 absolute just below the mean at these df
            # (P off by 3% and 63% at 5 sd below, against mpmath quadrature): use mpmath
            expected = mpmath_chi2_sf_below_mean(stat, df)  # oracle: mpmath.quad
        else:
            expected = float(special.chdtrc(df, stat))  # oracle: scipy.special.chdtrc
        assert_close(chi2_sf(stat, df), expected, (df, stat))


def test_norm_sf_matches_scipy_ndtr() -> None:
    for stat in [-40.0, -5.0, -1.0, 0.0, 0.5, 1.0, 1.96, 3.0, 8.0, 20.0, 37.0, 38.5]:
        expected = float(special.ndtr(-stat))  # oracle: scipy.special.ndtr
        assert_close(norm_sf(stat), expected, stat)


def test_special_cases_match_scipy() -> None:
    # oracle: scipy.special fdtrc, chdtrc and ndtr at the edges of the support
    for stat in [0.0, math.inf]:
        assert f_sf(stat, 3.0, 40.0) == special.fdtrc(3.0, 40.0, stat)
        assert chi2_sf(stat, 3.0) == special.chdtrc(3.0, stat)
    assert norm_sf(math.inf) == special.ndtr(-math.inf) == 0.0
    assert norm_sf(-math.inf) == special.ndtr(math.inf) == 1.0
    assert math.isnan(f_sf(math.nan, 3.0, 40.0)) and math.isnan(special.fdtrc(3.0, 40.0, np.nan))
    assert math.isnan(chi2_sf(math.nan, 3.0)) and math.isnan(special.chdtrc(3.0, np.nan))
    assert math.isnan(norm_sf(math.nan)) and math.isnan(special.ndtr(np.nan))


def test_statistics_below_the_support_have_tail_one() -> None:
    # by definition P(X > x) = 1 below the support of F and chi-squared (scipy returns NaN)
    assert f_sf(-1.0, 3.0, 40.0) == 1.0
    assert chi2_sf(-1.0, 3.0) == 1.0


def test_importing_the_module_does_not_import_scipy() -> None:
    code = (
        "import triage.core.distributions, sys; "
        "assert not any(m == 'scipy' or m.startswith('scipy.') for m in sys.modules)"
    )
    subprocess.run([sys.executable, "-c", code], check=True)
