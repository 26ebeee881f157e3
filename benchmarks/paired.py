"""The median of paired measurements and its distribution-free 95 % interval, for the benchmarks.

On a shared machine whole runs drift; measurements taken side by side (the same step of two
variants, or one round's runs) are paired and only their differences or ratios are summarised.
The interval is the order-statistic interval of a median (Conover, Practical Nonparametric
Statistics, 3rd ed., sec. 3.2).
"""
from __future__ import annotations

import math
import statistics


def median_interval(values) -> tuple[float, float, float]:
    """(median, low, high) of `values`, with [low, high] the 95 % interval of the median."""
    d = sorted(float(v) for v in values)
    n = len(d)
    half = 1.96 * math.sqrt(n) / 2
    return statistics.median(d), d[max(0, math.floor(n / 2 - half))], d[min(n - 1, math.ceil(n / 2 + half))]
