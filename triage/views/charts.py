"""Charts of residual summaries drawn as text with plotext, for the CLI and the app.

plotext keeps one module-level figure and is not thread-safe, so every chart is drawn
through :func:`_draw`, which holds :data:`_PLOT_LOCK`, clears the figure, sets the size,
runs the chart's own drawing steps and returns the built text. Binning is done with
numpy by the accumulators; plotext only draws bars and lines (``plt.hist`` took about
300 ms on a million values against 25 ms for ``plt.bar``, measured, ECOSYSTEM.md).
"""

from __future__ import annotations

import math
import threading
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass
from typing import TYPE_CHECKING, Any, Final

import numpy as np
import plotext as plt

from triage.views.format import cell_width, format_count, format_number, truncate
from triage.wording import counted

if TYPE_CHECKING:
    from numpy.typing import NDArray

_PLOT_LOCK: Final = threading.Lock()
"""Guards plotext's global figure; held for the whole of one chart."""

_MIN_WIDTH: Final = 20
"""Below this many columns a chart is replaced by a one-line note."""

_MIN_HEIGHT: Final = 6
"""Below this many lines a chart is replaced by a one-line note."""

_BAR_COLOR: Final = "cyan"
_MEAN_COLOR: Final = "orange"
_BAND_COLOR: Final = "gray"
_ZERO_COLOR: Final = "gray"


def _draw(steps: Callable[[], None], width: int, height: int, *, color: bool) -> str:
    """Clear plotext's figure, size it, run ``steps`` and return the built chart text.

    Parameters
    ----------
    steps : callable
        Issues the chart's plotext calls (bars, lines, ticks, labels).
    width, height : int
        Size of the chart in terminal cells.
    color : bool
        Keep plotext's ANSI colours; when False the text is plain.

    Returns
    -------
    str
        The chart, ``height`` lines of at most ``width`` characters.
    """
    with _PLOT_LOCK:
        plt.clear_figure()
        # Without lifting the limit plotext caps plots at 80x24 when no terminal is attached.
        plt.limitsize(False, False)
        plt.plotsize(width, height)
        plt.theme("clear")
        steps()
        text: str = plt.build().rstrip("\n")
    if not color:
        text = plt.uncolorize(text)
    return text


def _note(message: str, width: int, height: int) -> str:
    """Return a blank chart area of ``width`` x ``height`` with ``message`` in the middle."""
    width = max(width, 1)
    height = max(height, 1)
    lines = [" " * width] * height
    shown = truncate(message, width)
    margin = width - cell_width(shown)
    left = margin // 2 + (margin & width & 1)  # where str.center puts an odd space
    lines[(height - 1) // 2] = " " * left + shown + " " * (margin - left)
    return "\n".join(lines)


def _ticks(lo: float, hi: float, n_ticks: int) -> tuple[list[float], list[str]]:
    """Return round tick positions (steps of 1, 2 or 5 times a power of ten) on [lo, hi].

    Round steps put a tick on zero whenever the range spans it, so the zero line of a
    residual chart lines up with a label.
    """
    if not (math.isfinite(lo) and math.isfinite(hi) and hi > lo):
        return [lo], [format_number(lo, digits=3, trim=True)]
    n_ticks = max(n_ticks, 2)
    # The smallest round step that gives at most `n_ticks` ticks inside the range.
    power = 10.0 ** math.floor(math.log10((hi - lo) / n_ticks))
    for step in (m * power for m in (1.0, 2.0, 5.0, 10.0, 20.0, 50.0)):
        first = math.ceil(lo / step - 1e-9) * step
        count = math.floor((hi - first) / step + 1e-9) + 1
        if count <= n_ticks:
            break
    positions = [first + i * step for i in range(count)]
    # Snap values such as 3e-17 to 0 so they print as "0".
    positions = [0.0 if abs(p) < step * 1e-9 else p for p in positions]
    return positions, [format_number(p, digits=3, trim=True) for p in positions]


def _tick_count(width: int) -> int:
    """Return how many x-axis labels fit across ``width`` cells (one per ~14 cells)."""
    return max(2, min(9, width // 14))


ROBUST_HALF_WIDTH: Final = 4.0
"""The residual histogram spans the median ± this many robust SDs (IQR / 1.349)."""

_NORMAL_IQR: Final = 1.349
"""Interquartile range of a standard normal: IQR / 1.349 estimates the SD of normal errors."""


@dataclass(frozen=True)
class HistogramView:
    """The bars a residual histogram draws and the rows beyond them."""

    edges: NDArray[np.float64]
    """Bar edges (k + 1 increasing values)."""
    counts: NDArray[np.float64]
    """Rows per bar (k)."""
    below: int
    """Rows below the first edge."""
    above: int
    """Rows above the last edge."""
    is_robust: bool
    """True when the bars span the median ± `ROBUST_HALF_WIDTH` robust SDs."""


def histogram_view(histogram: Any, bars: int) -> HistogramView:
    """Choose what the residual histogram shows: the body of the residuals on a robust scale.

    A few huge residuals inflate the SD, so bars spanning ±4 SD squeeze the body of the
    residuals into a few columns. The bars span the median ± 4 × IQR / 1.349 instead (the
    IQR-based SD of normal errors), re-binned from the diagnostics pass's fine grid, and
    the rows beyond are counted. When the fine grid is too coarse for that window (fewer
    than 8 of its bins inside), the pass's own ±4 SD bins are shown.

    Parameters
    ----------
    histogram : ResidualHistogram
        From the diagnostics pass (quantiles, fine grid and counts).
    bars : int
        The most bars wanted (about half the chart width).

    Returns
    -------
    HistogramView
    """
    coarse = HistogramView(
        np.asarray(histogram.edges, dtype=np.float64),
        np.asarray(histogram.counts, dtype=np.float64),
        int(histogram.below),
        int(histogram.above),
        is_robust=False,
    )
    fine_edges = np.asarray(histogram.fine_edges, dtype=np.float64)
    fine = np.asarray(histogram.fine_counts, dtype=np.float64)
    q25, q50, q75 = (histogram.quantiles.get(q, math.nan) for q in (0.25, 0.5, 0.75))
    scale = (q75 - q25) / _NORMAL_IQR
    if fine_edges.size < 2 or not (math.isfinite(scale) and scale > 0 and math.isfinite(q50)):
        return coarse
    centers = (fine_edges[:-1] + fine_edges[1:]) / 2.0
    lo, hi = q50 - ROBUST_HALF_WIDTH * scale, q50 + ROBUST_HALF_WIDTH * scale
    inside = np.flatnonzero((centers >= lo) & (centers <= hi))
    if inside.size < 8:
        return coarse
    cells = fine[1:-1]
    group = max(1, math.ceil(inside.size / max(bars, 1)))
    starts = inside[::group]
    counts = np.add.reduceat(cells[inside[0] : inside[-1] + 1], starts - inside[0])
    edges = np.append(fine_edges[starts], fine_edges[inside[-1] + 1])
    below = int(fine[0] + cells[: inside[0]].sum())
    above = int(fine[-1] + cells[inside[-1] + 1 :].sum())
    return HistogramView(edges, counts.astype(np.float64), below, above, is_robust=True)


def render_histogram(histogram: Any, width: int, height: int, *, color: bool) -> str:
    """Draw the residual histogram on a robust scale, with the rows beyond it counted below.

    Parameters
    ----------
    histogram : object
        A residual histogram from the diagnostics pass (see `histogram_view`).
    width, height : int
        Size of the chart in terminal cells (about 76x14 in an 80x24 terminal).
    color : bool
        Colour the chart with ANSI codes; False gives plain text.

    Returns
    -------
    str
        The chart text.

    See Also
    --------
    render_binned : mean residual per bin of fitted value or predictor.
    """
    if width < _MIN_WIDTH or height < _MIN_HEIGHT:
        return _note("residual histogram: enlarge to see", width, height)
    view = histogram_view(histogram, max(10, (width - 8) // 2))
    edges, counts, below, above = view.edges, view.counts, view.below, view.above
    if counts.size == 0 or (counts.sum() == 0 and below + above == 0):
        return _note("no residuals to draw", width, height)
    centers = (edges[:-1] + edges[1:]) / 2.0
    lo_text = format_number(edges[0], digits=3, trim=True)
    hi_text = format_number(edges[-1], digits=3, trim=True)
    total = int(counts.sum()) + below + above
    scale = "median ± 4 robust SD (IQR/1.349)" if view.is_robust else "± 4 SD"
    bar_width = format_number(float(edges[1] - edges[0]) if edges.size > 1 else 1.0, digits=2)
    title = _fit_words(
        (
            f"residuals of {format_count(total)} rows, {scale}",
            f"residuals, {'median ± 4 robust SD' if view.is_robust else '± 4 SD'}",
            "residuals",
        ),
        width,
    )
    tail_note = _fit_words(
        (
            f"{counted(below, 'row')} below {lo_text}, {counted(above, 'row')} above {hi_text}; "
            f"bars {bar_width} wide",
            f"{counted(below, 'row')} below {lo_text}, {counted(above, 'row')} above {hi_text}",
            f"{format_count(below)} below, {format_count(above)} above",
        ),
        width,
    )

    def steps() -> None:
        plt.bar(
            centers.tolist(),
            counts.tolist(),
            width=1.0,
            marker="sd",
            color=_BAR_COLOR if color else None,
        )
        plt.title(title)
        plt.xlabel(tail_note)
        ticks, labels = _ticks(float(edges[0]), float(edges[-1]), _tick_count(width))
        plt.xticks(ticks, labels)
        top = float(counts.max())
        y_ticks, y_labels = _ticks(0.0, top, max(2, min(4, height // 4)))
        plt.yticks(y_ticks, [format_count(y) for y in y_ticks] if top >= 10 else y_labels)

    return _draw(steps, width, height, color=color)


def render_quantile_chart(
    quantiles: Mapping[float, float], width: int, height: int, *, color: bool
) -> str:
    """Draw the studentized residuals' quantiles against a normal's, with the line of equality.

    Points on the line: tails like a normal's. Points that leave it upwards on the right
    or downwards on the left: heavier tails; a bend to one side only: skew.

    Parameters
    ----------
    quantiles : mapping of float to float
        Probability -> quantile of the studentized residuals (`Diagnostics`).
    width, height : int
        Size of the chart in terminal cells.
    color : bool
        Colour the chart with ANSI codes; False gives plain text.

    Returns
    -------
    str
        The chart text.
    """
    from statistics import NormalDist

    title = "studentized residuals vs normal"
    if width < _MIN_WIDTH or height < _MIN_HEIGHT:
        return _note(f"{title}: enlarge to see", width, height)
    points = sorted((p, q) for p, q in quantiles.items() if 0.0 < p < 1.0 and math.isfinite(q))
    if not points:
        return _note(f"{title}: no rows to draw", width, height)
    normal = [NormalDist().inv_cdf(p) for p, _ in points]
    observed = [q for _, q in points]
    lo = min(min(normal), min(observed))
    hi = max(max(normal), max(observed))

    def steps() -> None:
        plt.plot([lo, hi], [lo, hi], marker="dot", color=_ZERO_COLOR if color else None)
        plt.scatter(normal, observed, marker="●", color=_MEAN_COLOR if color else None)
        plt.title(title)
        plt.xlabel(
            _fit_words(
                (
                    "normal quantile; on the dotted line: normal tails",
                    "normal quantiles (line: equal)",
                ),
                width,
            )
        )
        ticks, labels = _ticks(min(normal), max(normal), max(3, min(5, width // 14)))
        plt.xticks(ticks, labels)
        y_ticks, y_labels = _ticks(lo, hi, max(2, min(5, height // 3)))
        plt.yticks(y_ticks, y_labels)

    return _draw(steps, width, height, color=color)


def _fit_words(wordings: Sequence[str], width: int) -> str:
    """Return the first wording that fits a chart `width` cells wide (else the last)."""
    room = width - _LEGEND_MARGIN
    return next((w for w in wordings if len(w) <= room), wordings[-1])


def side_by_side(left: str, right: str, left_width: int) -> str:
    """Join two charts line by line, the left one padded to `left_width` cells."""
    from rich.text import Text

    lines = []
    for a, b in zip(left.split("\n"), right.split("\n"), strict=False):
        pad = max(0, left_width - Text.from_ansi(a).cell_len)
        lines.append(f"{a}{' ' * pad}{b}")
    return "\n".join(lines)


def binned_legend(x_label: str, width: int) -> str:
    """Return the legend under a binned chart: the longest wording that fits `width`.

    It always says what the dots and the dotted band are and that the bins hold about
    equal numbers of rows; plotext leaves out a label wider than the plot, so a legend
    that does not fit would leave the line blank.
    """
    wordings = (
        f"{x_label} in bins of about equal rows (● mean residual, dotted: 10-90%)",
        f"{x_label}, bins of ~equal rows; ● mean residual, dotted 10-90%",
        "bins of ~equal rows; ● mean residual, dotted 10-90%",
        "~equal-row bins; ● mean, dotted 10-90%",
        "● mean, dotted 10-90%",
    )
    return _fit_words(wordings, width)


_LEGEND_MARGIN: Final = 8
"""Cells a chart's x label must leave free: the y-axis labels and the frame."""


def _position(x_mean: float, lo: float, hi: float) -> float:
    """Return where to draw a bin: the mean of its values, else its middle or finite end."""
    if math.isfinite(x_mean):
        return x_mean
    if math.isfinite(lo) and math.isfinite(hi):
        return (lo + hi) / 2.0
    return lo if math.isfinite(lo) else hi


_PLOTTED_FIELDS: Final = ("lo", "hi", "mean_resid", "q10", "q90")
"""Bin fields `render_binned` draws or sizes its axes by."""


def _bin_arrays(bins: Sequence[Any]) -> dict[str, NDArray[np.float64]]:
    """Collect the plotted fields of non-empty bins into arrays keyed by field name.

    Keys are `_PLOTTED_FIELDS` plus ``x``, where each bin is drawn.
    """
    kept = [b for b in bins if int(b.n) > 0 and math.isfinite(float(b.mean_resid))]
    arrays = {
        name: np.array([float(getattr(b, name)) for b in kept], dtype=np.float64)
        for name in _PLOTTED_FIELDS
    }
    arrays["x"] = np.array(
        [_position(float(b.x_mean), float(b.lo), float(b.hi)) for b in kept], dtype=np.float64
    )
    return arrays


def render_binned(
    bins: Sequence[Any],
    width: int,
    height: int,
    *,
    title: str,
    x_label: str,
    color: bool,
) -> str:
    """Draw mean residual per bin, with the 10%-90% spread of residuals and a zero line.

    A model that fits keeps the mean line near zero across the whole range; a bend
    suggests a missing curve or interaction, and a widening band suggests changing spread.

    Parameters
    ----------
    bins : sequence of objects
        Bins in increasing order, each with ``lo``, ``hi``, ``n``, ``x_mean`` (where the
        bin is drawn), ``mean_resid``, ``q10`` and ``q90``; empty bins are skipped.
    width, height : int
        Size of the chart in terminal cells.
    title : str
        Chart title, e.g. ``"residual by fitted value"``.
    x_label : str
        What the bins are cut on, e.g. ``"fitted"`` or a predictor name.
    color : bool
        Colour the chart with ANSI codes; False gives plain text.

    Returns
    -------
    str
        The chart text.

    See Also
    --------
    render_histogram : distribution of residuals.
    """
    if width < _MIN_WIDTH or height < _MIN_HEIGHT:
        return _note(f"{title}: enlarge to see", width, height)
    arrays = _bin_arrays(bins)
    x, mean = arrays["x"], arrays["mean_resid"]
    if x.size == 0:
        return _note(f"{title}: no rows to draw", width, height)
    band_ok = np.isfinite(arrays["q10"]) & np.isfinite(arrays["q90"])
    values = np.concatenate([mean, arrays["q10"][band_ok], arrays["q90"][band_ok], [0]])
    y_lo, y_hi = float(values.min()), float(values.max())
    pad = 0.05 * (y_hi - y_lo) if y_hi > y_lo else 1.0
    # Bins hold about equal numbers of rows, so they are drawn evenly spaced and labelled
    # with the mean value inside each: a long tail (a few very large values) would otherwise
    # squeeze every other bin into a corner of the chart.
    order = np.arange(x.size, dtype=np.float64)
    n_ticks = min(x.size, _tick_count(width))
    tick_at = np.unique(np.linspace(0, x.size - 1, n_ticks).round().astype(int))

    def steps() -> None:
        plt.hline(0.0, color=_ZERO_COLOR if color else None)
        if band_ok.any():
            xb = order[band_ok].tolist()
            band_color = _BAND_COLOR if color else None
            plt.plot(xb, arrays["q90"][band_ok].tolist(), marker="dot", color=band_color)
            plt.plot(xb, arrays["q10"][band_ok].tolist(), marker="dot", color=band_color)
        mean_color = _MEAN_COLOR if color else None
        plt.plot(order.tolist(), mean.tolist(), marker="hd", color=mean_color)
        plt.scatter(order.tolist(), mean.tolist(), marker="●", color=mean_color)
        plt.title(title)
        plt.xlabel(binned_legend(x_label, width))
        plt.ylim(y_lo - pad, y_hi + pad)
        plt.xlim(-0.5, x.size - 0.5)
        plt.xticks(tick_at.tolist(), [format_number(x[i], digits=3, trim=True) for i in tick_at])
        y_ticks, y_labels = _ticks(y_lo, y_hi, max(2, min(5, height // 3)))
        plt.yticks(y_ticks, y_labels)

    return _draw(steps, width, height, color=color)
