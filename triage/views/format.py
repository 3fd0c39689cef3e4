"""Compact number and name formatting shared by the text, chart and app views.

Every renderer formats numbers through these helpers so the CLI report and the app
agree on how a value looks and on the mark for "not available".
"""

from __future__ import annotations

import math
from typing import Final, Literal

import numpy as np
from rich.cells import cell_len

NA: Final = "—"
"""Shown in place of a value that is not available (None, NaN)."""

ELLIPSIS: Final = "…"
"""Marks a name cut to fit its column."""

Align = Literal["<", ">"]
"""Left or right alignment of a column."""

P_FLOOR: Final = 1e-300
"""p-values below this (including an exact 0 from underflow) print as ``<1e-300``."""


def as_float(value: object) -> float | None:
    """Return ``value`` as a Python float, or None when it is missing or not a number.

    Parameters
    ----------
    value : object
        A Python or numpy number, None, or anything else.

    Returns
    -------
    float or None
        None for None, NaN, and values that are not real numbers; infinities are kept.
    """
    if value is None or isinstance(value, bool | str | bytes):
        return None
    if isinstance(value, int | float | np.integer | np.floating):
        number = float(value)
        return None if math.isnan(number) else number
    return None


def _compact_exponent(text: str) -> str:
    """Turn Python's ``1.23e+06`` / ``4.5e-07`` into ``1.23e6`` / ``4.5e-7``."""
    mantissa, _, exponent = text.partition("e")
    return f"{mantissa}e{int(exponent)}"


def _trim_zeros(text: str) -> str:
    """Drop trailing zeros after a decimal point: ``2.50`` -> ``2.5``, ``1.0e3`` -> ``1e3``."""
    mantissa, sep, exponent = text.partition("e")
    if "." in mantissa:
        mantissa = mantissa.rstrip("0").rstrip(".")
    return mantissa + sep + exponent


def format_number(value: object, *, digits: int = 4, trim: bool = False) -> str:
    """Format a real number with ``digits`` significant digits, compactly.

    Values between 1e-4 and 1e6 in size print in fixed notation (``0.03125``,
    ``12350``); others in short scientific notation (``1.235e7``, ``3.1e-9``).

    Parameters
    ----------
    value : object
        The number; None and NaN print as the not-available mark.
    digits : int, default=4
        Significant digits to keep (at least 1).
    trim : bool, default=False
        Drop trailing zeros (``2.5`` rather than ``2.500``), e.g. for axis labels.

    Returns
    -------
    str
        The formatted number, ``inf``/``-inf`` for infinities, or :data:`NA`.
    """
    number = as_float(value)
    if number is None:
        return NA
    if math.isinf(number):
        return "inf" if number > 0 else "-inf"
    if number == 0.0:
        return "0"
    digits = max(1, digits)
    # Round to the significant digits first, so 9.99996 becomes 10.00, not 10.000.
    rounded = float(f"{number:.{digits - 1}e}")
    exponent = math.floor(math.log10(abs(rounded)))
    if -4 <= exponent < 6:
        decimals = max(0, digits - 1 - exponent)
        text = f"{rounded:.{decimals}f}"
    else:
        text = _compact_exponent(f"{rounded:.{digits - 1}e}")
    return _trim_zeros(text) if trim else text


def format_count(value: object) -> str:
    """Format a count with thousands separators (``1,204``), or :data:`NA` when missing.

    Parameters
    ----------
    value : object
        An integer-valued number or None.

    Returns
    -------
    str
        The count with commas, or :data:`NA`.
    """
    number = as_float(value)
    if number is None or math.isinf(number):
        return NA
    return f"{round(number):,}"


def format_p(value: object) -> str:
    """Format a p-value: ``0.0312``, ``0.000412``, ``3.1e-9`` or ``<1e-300``.

    Parameters
    ----------
    value : object
        The p-value; None and NaN print as :data:`NA`.

    Returns
    -------
    str
        Three significant digits down to 1e-4, two below that, and ``<1e-300`` for
        values under :data:`P_FLOOR` (where double precision has run out).
    """
    number = as_float(value)
    if number is None:
        return NA
    if number < P_FLOOR:
        return "<1e-300"
    if number >= 1e-4:
        return format_number(number, digits=3)
    return format_number(number, digits=2)


def cell_width(text: str) -> int:
    """Return the terminal cells ``text`` takes: 2 for a CJK character or most emoji, 1 for most.

    Widths are rich's (`rich.cells.cell_len`, the table Textual draws with), so text laid out
    here lines up with what the app draws.

    Examples
    --------
    >>> cell_width("minutes"), cell_width("配達時間"), cell_width("🚚")
    (7, 8, 2)
    """
    return cell_len(text)


def truncate(text: str, width: int) -> str:
    """Cut ``text`` to at most ``width`` terminal cells, ending in an ellipsis when cut.

    Parameters
    ----------
    text : str
        A name or label.
    width : int
        The room available, in cells; 0 or less gives an empty string.

    Returns
    -------
    str
        ``text`` unchanged if it fits, else its start followed by :data:`ELLIPSIS`; one cell
        short of ``width`` when a wide character would have straddled the cut.

    Examples
    --------
    >>> truncate("配達時間", 6), truncate("distance_km", 6)
    ('配達…', 'dista…')
    """
    if cell_len(text) <= width:
        return text  # also text of zero-width characters only, at width 0
    if width <= 0:
        return ""
    kept, used = [], 0
    for char in text:
        used += cell_len(char)
        if used > width - 1:
            break
        kept.append(char)
    return "".join(kept) + ELLIPSIS


def fit_cell(text: str, width: int, align: Align = "<") -> str:
    """Cut ``text`` to ``width`` terminal cells and pad it with spaces to exactly that many.

    Parameters
    ----------
    text : str
        A cell's text.
    width : int
        The column's width in cells.
    align : {"<", ">"}, default="<"
        Left (pad on the right) or right alignment.

    Examples
    --------
    >>> fit_cell("配達", 6) + "|", fit_cell("7", 3, ">") + "|"
    ('配達  |', '  7|')
    """
    cut = truncate(text, width)
    padding = " " * (width - cell_len(cut))
    return cut + padding if align == "<" else padding + cut


def amount_decimals(scale: object, *, significant: int = 3) -> int:
    """Return the decimals of the figures in a target's units under one fit.

    Observed, fitted and residual values are printed with the same decimals on every
    screen, so ``residual = observed - fitted`` checks by eye: enough to show the fit's
    residual SD (`scale`) to `significant` digits.

    Parameters
    ----------
    scale : number
        The residual SD of the fit.
    significant : int, default=3
        Significant digits of `scale`.

    Returns
    -------
    int
        Between 0 and 6; 1 when `scale` is missing, zero or infinite.
    """
    size = as_float(scale)
    if size is None or not math.isfinite(size) or size == 0.0:
        return 1
    return min(6, max(0, significant - 1 - math.floor(math.log10(abs(size)))))


def format_fixed(value: object, decimals: int) -> str:
    """Format a number with thousands separators and fixed `decimals` (``2,619.8``).

    Parameters
    ----------
    value : object
        The number; None and NaN print as :data:`NA`.
    decimals : int
        Digits after the point, e.g. from `amount_decimals`.

    Returns
    -------
    str
    """
    number = as_float(value)
    if number is None:
        return NA
    if math.isinf(number):
        return "inf" if number > 0 else "-inf"
    return f"{number:,.{decimals}f}"
