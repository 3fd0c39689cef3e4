"""Counts in words for messages and screens: ``1 row``, ``2 rows``, ``1 row group``."""

from __future__ import annotations


def counted(count: float, noun: str) -> str:
    """Write `count` with thousands separators and `noun` in the number it takes.

    >>> counted(1, "row group"), counted(4149, "row")
    ('1 row group', '4,149 rows')
    """
    whole = int(count)
    return f"{whole:,} {noun}" if whole == 1 else f"{whole:,} {noun}s"
