"""Statistics for benchmark grids: small-sample intervals, paired tests, ranks and the gap a method closes.

Everything here is a pure function over plain numbers (one number per seed, or one mean per shift); nothing
reads files or rows. Missing values (``None`` or NaN) are dropped and counted, never silently turned into 0.

A benchmark usually has 3-10 seeds, so every interval uses Student's t distribution with ``n - 1`` degrees
of freedom rather than the normal approximation, and every quantity that cannot be computed from the data
at hand (one seed, identical differences, no gap to close) comes back as ``None`` with a plain-words reason
instead of a NaN or an exception.
"""
from __future__ import annotations

import math
import numbers
from dataclasses import dataclass, field
from decimal import ROUND_HALF_UP, Decimal
from typing import Hashable, Iterable, Mapping, Optional, Sequence

import numpy as np
from scipy import stats as _st

from adaptkit._checks import check_number

__all__ = [
    "Interval",
    "PairedComparison",
    "RankSummary",
    "t_interval",
    "paired_comparison",
    "average_ranks",
    "gap_closed",
    "round_sig",
    "format_mean_ci",
    "format_seeds",
    "format_p",
]


# --------------------------------------------------------------------------------------------------------------
# helpers


def _is_missing(x) -> bool:
    if x is None:
        return True
    if isinstance(x, (bool, np.bool_)) or not isinstance(x, numbers.Real):
        raise TypeError(f"Expected a number or None, got {x!r} of type {type(x).__name__}.")
    return not math.isfinite(float(x))


def _finite(values: Iterable) -> tuple[np.ndarray, int]:
    """The finite values as a float array, and how many were missing (None / NaN / inf)."""
    kept, missing = [], 0
    for v in values:
        if _is_missing(v):
            missing += 1
        else:
            kept.append(float(v))
    return np.asarray(kept, dtype=float), missing


def _check_confidence(confidence: float, owner: str) -> float:
    return check_number("confidence", owner, confidence, low=0.0, high=1.0, low_open=True, high_open=True)


# --------------------------------------------------------------------------------------------------------------
# intervals


@dataclass(frozen=True)
class Interval:
    """A mean with its two-sided Student-t confidence interval.

    ``low``/``high`` are ``None`` when the interval is undefined (fewer than two values); ``reason`` then says
    why. ``mean`` is ``None`` only when there are no values at all. ``n`` counts the values used and
    ``n_missing`` the ``None``/NaN values that were dropped.
    """

    mean: Optional[float]
    low: Optional[float]
    high: Optional[float]
    n: int
    confidence: float
    n_missing: int = 0
    reason: Optional[str] = None

    @property
    def half_width(self) -> Optional[float]:
        """Half the interval's width (the "±" part), or ``None`` when the interval is undefined."""
        if self.low is None or self.high is None:
            return None
        return (self.high - self.low) / 2.0

    def __str__(self) -> str:
        return format_mean_ci(self.mean, self.half_width)


def t_interval(values: Iterable[Optional[float]], confidence: float = 0.95) -> Interval:
    """Confidence interval of the mean of ``values`` from Student's t distribution.

    With ``n`` finite values, mean ``m`` and sample standard deviation ``s`` (``ddof=1``)::

        m ± t_{(1+confidence)/2, n-1} · s / sqrt(n)

    This is the interval ``scipy.stats.t.interval(confidence, n - 1, loc=m, scale=s / sqrt(n))`` returns. It
    assumes the per-seed results are independent draws from one distribution; with very few seeds it is
    wide, which is the honest answer. When all values are equal (``s == 0``) the interval is the single point
    ``[m, m]``. ``None``/NaN values are dropped and counted in ``n_missing``.

    Example::

        >>> iv = t_interval([0.80, 0.82, 0.84])
        >>> round(iv.mean, 2), round(iv.half_width, 4)
        (0.82, 0.0497)
    """
    confidence = _check_confidence(confidence, "t_interval")
    x, missing = _finite(values)
    n = int(x.size)
    if n == 0:
        return Interval(None, None, None, 0, confidence, missing, "no values")
    mean = float(x.mean())
    if n == 1:
        return Interval(mean, None, None, 1, confidence, missing,
                        "one value: a confidence interval needs at least two seeds")
    if np.all(x == x[0]):  # identical seeds: a point, without the ~1e-16 noise np.std would add
        return Interval(float(x[0]), float(x[0]), float(x[0]), n, confidence, missing, None)
    sem = float(x.std(ddof=1)) / math.sqrt(n)
    half = float(_st.t.ppf(0.5 + confidence / 2.0, n - 1)) * sem
    return Interval(mean, mean - half, mean + half, n, confidence, missing, None)


# --------------------------------------------------------------------------------------------------------------
# paired comparison


@dataclass(frozen=True)
class PairedComparison:
    """Method ``a`` against method ``b`` over the seeds where both have a value.

    ``difference`` is the mean of ``a - b`` per seed with its t interval. ``t_test_p`` is the two-sided
    paired Student t-test p-value; ``wilcoxon_p`` the two-sided Wilcoxon signed-rank p-value. Either is
    ``None`` when undefined, with the reason in ``t_test_reason`` / ``wilcoxon_reason``.
    ``wilcoxon_min_p`` is the smallest p-value the signed-rank test can give with this many non-zero
    differences (``2 / 2**n``): with 3 seeds it is 0.25, so the test cannot flag anything.
    """

    a: str
    b: str
    seeds: tuple
    difference: Interval
    t_test_p: Optional[float]
    wilcoxon_p: Optional[float]
    t_test_reason: Optional[str] = None
    wilcoxon_reason: Optional[str] = None
    wilcoxon_min_p: Optional[float] = None
    unpaired_seeds: tuple = field(default_factory=tuple)

    @property
    def n(self) -> int:
        """Number of paired seeds used."""
        return len(self.seeds)


def paired_comparison(
    a: Mapping[Hashable, Optional[float]],
    b: Mapping[Hashable, Optional[float]],
    *,
    a_name: str = "a",
    b_name: str = "b",
    confidence: float = 0.95,
) -> PairedComparison:
    """Compare two methods run with the same seeds: ``a`` and ``b`` map seed → target accuracy.

    Only seeds where both values are present and finite are paired (the rest are listed in
    ``unpaired_seeds``); pairing by seed removes the between-seed variation both methods share (same data
    split, same initialisation), which makes the comparison far sharper than comparing two unpaired means.

    * mean paired difference ``d̄ = mean(a_i - b_i)`` with its Student-t interval (see :func:`t_interval`);
    * **paired t-test**: ``t = d̄ / (s_d / sqrt(n))`` with ``n - 1`` degrees of freedom, two-sided p-value
      ``2 · scipy.stats.t.sf(|t|, n - 1)`` — the value ``scipy.stats.ttest_rel(a, b)`` gives. Undefined for
      ``n < 2`` or when every difference is the same (``s_d = 0``);
    * **Wilcoxon signed-rank test**: ``scipy.stats.wilcoxon(a - b)`` with its defaults (zero differences
      dropped; exact null distribution without ties, exact sign-flip enumeration with ties for n ≤ 13, normal
      approximation above 50). It assumes less than the t-test (no normality) but with few seeds it
      cannot reach small p-values at all (see ``wilcoxon_min_p``). Undefined when every difference is zero.

    Neither p-value is corrected for multiple comparisons.

    Example::

        >>> c = paired_comparison({0: .81, 1: .84, 2: .80}, {0: .78, 1: .80, 2: .79}, a_name="dann", b_name="src")
        >>> round(c.difference.mean, 3), round(c.t_test_p, 3), c.wilcoxon_p
        (0.027, 0.094, 0.25)
    """
    confidence = _check_confidence(confidence, "paired_comparison")
    for name, m in (("a", a), ("b", b)):
        if not isinstance(m, Mapping):
            raise TypeError(f"The {name!r} parameter of paired_comparison must be a mapping seed -> value. "
                            f"Got {type(m).__name__} instead.")
    paired, unpaired = [], []
    for seed in _ordered_union(a, b):
        va, vb = a.get(seed), b.get(seed)
        if _is_missing(va) or _is_missing(vb):
            unpaired.append(seed)
        else:
            paired.append(seed)
    d = np.asarray([float(a[s]) - float(b[s]) for s in paired], dtype=float)
    diff = t_interval(d, confidence)
    n = int(d.size)

    t_p = t_reason = None
    if n < 2:
        t_reason = f"{n} paired seed{'s' if n != 1 else ''}: the paired t-test needs at least two"
    else:
        sd = float(d.std(ddof=1))
        # exact float equality of all differences; a tiny relative tolerance guards against rounding noise
        if sd <= 1e-12 * max(1.0, float(np.abs(d).max())):
            t_reason = "every paired difference is the same: the t statistic is undefined (zero variance)"
        else:
            t_stat = float(d.mean()) / (sd / math.sqrt(n))
            t_p = float(2.0 * _st.t.sf(abs(t_stat), n - 1))

    w_p = w_reason = w_min = None
    nonzero = int(np.count_nonzero(d))
    if n == 0:
        w_reason = "no paired seeds"
    elif nonzero == 0:
        w_reason = "every paired difference is zero: the signed-rank test has nothing to rank"
    else:
        w_min = min(1.0, 2.0 / 2.0 ** nonzero)
        w_p = float(_st.wilcoxon(d).pvalue)

    return PairedComparison(
        a=a_name, b=b_name, seeds=tuple(paired), difference=diff,
        t_test_p=t_p, wilcoxon_p=w_p, t_test_reason=t_reason, wilcoxon_reason=w_reason,
        wilcoxon_min_p=w_min, unpaired_seeds=tuple(unpaired),
    )


def _ordered_union(*maps: Mapping) -> list:
    seen: dict = {}
    for m in maps:
        for k in m:
            seen.setdefault(k, None)
    try:
        return sorted(seen)
    except TypeError:  # mixed key types: keep first-seen order
        return list(seen)


# --------------------------------------------------------------------------------------------------------------
# ranks


@dataclass(frozen=True)
class RankSummary:
    """Average rank of each method across shifts (1 = best).

    ``per_shift[shift][method]`` is the rank on one shift (ties share the average of the ranks they span);
    ``mean_rank[method]`` averages those over ``shifts_used``. Shifts where some method has no value are
    listed in ``shifts_dropped`` and not ranked, because ranks over different sets of methods are not
    comparable.
    """

    mean_rank: dict
    per_shift: dict
    shifts_used: tuple
    shifts_dropped: tuple


TIE_TOLERANCE = 1e-6  # ours: scores closer than this (times max(1, |score|)) tie; float32's eps is 1.2e-7


def tolerant_ranks(values: Sequence[float], tol: float = TIE_TOLERANCE) -> np.ndarray:
    """Ranks of ``values`` (1 = smallest) where values within ``tol * max(1, max |value|)`` of their neighbour
    in sorted order share the average of the ranks they span — ``scipy.stats.rankdata(method="average")`` with
    float noise treated as a tie.

    Example:
        >>> tolerant_ranks([0.7, 0.7000000001, 0.5]).tolist()
        [2.5, 2.5, 1.0]
    """
    v = np.asarray(values, dtype=float)
    if v.size == 0:
        return v
    order = np.argsort(v, kind="stable")
    gap = tol * max(1.0, float(np.max(np.abs(v))))
    ranks = np.empty(v.size)
    start = 0
    for i in range(1, v.size + 1):
        if i == v.size or v[order[i]] - v[order[i - 1]] > gap:  # a group of ties ends before i
            ranks[order[start:i]] = (start + 1 + i) / 2  # the mean of ranks start+1 .. i
            start = i
    return ranks


def average_ranks(
    table: Mapping[Hashable, Mapping[str, Optional[float]]],
    *,
    methods: Optional[Sequence[str]] = None,
    higher_is_better: bool = True,
) -> RankSummary:
    """Rank methods on each shift by their score and average the ranks across shifts.

    ``table[shift][method]`` is a score (typically the mean target accuracy over seeds). On each shift the
    best method gets rank 1; tied methods share the mean of the ranks they occupy (as
    ``scipy.stats.rankdata(..., method="average")``), and scores within :data:`TIE_TOLERANCE` are ties
    (:func:`tolerant_ranks`: a mean of float32 accuracies summed in another order is the same score). ``methods`` fixes which methods are ranked (default:
    every method that appears). A shift where any of those methods is missing is dropped from the average and
    listed in ``shifts_dropped``: averaging ranks only makes sense over complete blocks.

    Example::

        >>> r = average_ranks({"moons": {"a": .9, "b": .8}, "blobs": {"a": .7, "b": .7}})
        >>> r.mean_rank
        {'a': 1.25, 'b': 1.75}
    """
    if methods is None:
        names: dict = {}
        for row in table.values():
            for m in row:
                names.setdefault(m, None)
        methods = list(names)
    methods = list(methods)
    per_shift, used, dropped = {}, [], []
    for shift, row in table.items():
        vals = [row.get(m) for m in methods]
        if not methods or any(_is_missing(v) for v in vals):
            dropped.append(shift)
            continue
        scores = np.asarray(vals, dtype=float)
        ranks = tolerant_ranks(-scores if higher_is_better else scores)
        per_shift[shift] = {m: float(r) for m, r in zip(methods, ranks)}
        used.append(shift)
    mean_rank = {m: (float(np.mean([per_shift[s][m] for s in used])) if used else None) for m in methods}
    return RankSummary(mean_rank, per_shift, tuple(used), tuple(dropped))


# --------------------------------------------------------------------------------------------------------------
# gap closed


def gap_closed(
    acc_method: Optional[float],
    acc_source: Optional[float],
    acc_oracle: Optional[float],
    *,
    min_gap: float = 0.01,
) -> Optional[float]:
    """Fraction of the source-only → target-oracle gap that a method closes.

    ``(acc_method - acc_source) / (acc_oracle - acc_source)``: 0 means no better than training on the source
    alone, 1 means as good as training on labelled target data, a negative value means adaptation made the
    model *worse* than source-only. Values above 1 are possible (the oracle is itself a noisy estimate).

    Returns ``None`` when any input is missing or the gap ``acc_oracle - acc_source`` is below ``min_gap``
    (default 0.01, one accuracy point on a 0-1 scale): with no gap there is nothing to close, and dividing by
    a tiny gap turns seed noise into huge ratios.

    Example::

        >>> round(gap_closed(0.75, 0.70, 0.90), 6)
        0.25
    """
    check_number("min_gap", "gap_closed", min_gap, low=0.0)
    if any(_is_missing(v) for v in (acc_method, acc_source, acc_oracle)):
        return None
    gap = float(acc_oracle) - float(acc_source)
    if gap <= 0 or gap < min_gap:
        return None
    return (float(acc_method) - float(acc_source)) / gap


# --------------------------------------------------------------------------------------------------------------
# formatting


def round_sig(x: float, digits: int = 2) -> float:
    """``x`` rounded to ``digits`` significant digits (half away from zero): ``round_sig(0.01234, 2) == 0.012``."""
    check_number("digits", "round_sig", digits, low=1, integer=True)
    if x == 0 or not math.isfinite(x):
        return float(x)
    decimals = digits - 1 - math.floor(math.log10(abs(x)))
    return float(_quantize(x, decimals))


def _quantize(x: float, decimals: int) -> Decimal:
    """``x`` rounded half away from zero to ``decimals`` places (negative: to tens, hundreds …).

    Goes through ``repr`` so that 0.125 rounds as the decimal 0.125 a reader sees, not its binary neighbour.
    """
    return Decimal(repr(float(x))).quantize(Decimal(1).scaleb(-decimals), rounding=ROUND_HALF_UP)


def _ci_decimals(half_width: float) -> int:
    """Decimal place at which to round a half-width: two significant digits when its leading digit is 1 or 2,
    otherwise one. Re-derived once after rounding, since rounding can change the leading digit (2.96 → 3.0)."""
    def decimals_for(h: float) -> int:
        e = math.floor(math.log10(h))
        lead = int(h / 10.0 ** e + 1e-9)
        return (2 if lead in (1, 2) else 1) - 1 - e

    dec = decimals_for(half_width)
    rounded = float(_quantize(half_width, dec))
    return decimals_for(rounded) if rounded > 0 else dec


def _fmt_fixed(x: float, decimals: int) -> str:
    q = _quantize(x, decimals)
    if decimals <= 0:
        return str(int(q))
    s = f"{q:.{decimals}f}"
    return "0" + s[2:] if s.startswith("-0") and set(s[2:]) <= set(".0") else s  # no "-0.0"


def format_mean_ci(
    mean: Optional[float],
    half_width: Optional[float],
    *,
    fallback_decimals: int = 2,
    missing: str = "n/a",
) -> str:
    """Print ``mean ± half_width`` with the precision the interval supports.

    Rule (the usual convention for reporting a measurement with its uncertainty): round the half-width to
    **two significant digits if its leading digit is 1 or 2, otherwise to one**, and round the mean to the
    **same decimal place**. Digits beyond the interval's own precision are noise and are not printed.

    * ``format_mean_ci(82.3456, 3.1234) == "82 ± 3"``
    * ``format_mean_ci(82.3456, 1.5234) == "82.3 ± 1.5"``
    * ``format_mean_ci(0.82346, 0.0123) == "0.823 ± 0.012"``
    * ``format_mean_ci(82.3456, 34.0) == "80 ± 30"``

    When the half-width is undefined (one seed) the mean is printed with ``fallback_decimals`` decimals and
    the interval as ``missing``: ``"82.35 ± n/a"``. A zero half-width (all seeds identical) prints as
    ``"82.35 ± 0"``. A missing mean prints as ``missing``.
    """
    if _is_missing(mean):
        return missing
    mean = float(mean)
    if _is_missing(half_width):
        return f"{_fmt_fixed(mean, fallback_decimals)} ± {missing}"
    h = abs(float(half_width))
    if h <= 1e-12 * max(1.0, abs(mean)):  # zero up to float rounding
        h = 0.0
    if h == 0:
        return f"{_fmt_fixed(mean, fallback_decimals)} ± 0"
    dec = _ci_decimals(h)
    return f"{_fmt_fixed(mean, dec)} ± {_fmt_fixed(h, dec)}"


MIN_SEEDS_FOR_CI = 3  # ours: below this a t-interval (t = 12.7 at 95% for 2 seeds) says little; print the range


def format_seeds(values: Iterable[Optional[float]], *, scale: float = 1.0, confidence: float = 0.95,
                 fallback_decimals: int = 2) -> str:
    """A mean over seeds for a table: ``mean ± half-width`` of the Student-t interval (:func:`format_mean_ci`)
    from :data:`MIN_SEEDS_FOR_CI` values on; with two, the mean and the range of the two values, said as such
    (``"80 (range 72–88, 2 seeds)"``): an interval "80 ± 100" from two seeds would read as a measurement.
    ``scale`` multiplies every value (100: percentages).

    Example:
        >>> format_seeds([0.72, 0.88], scale=100), format_seeds([0.80, 0.82, 0.84], scale=100)
        ('80 (range 72–88, 2 seeds)', '82 ± 5')
    """
    x, _ = _finite(values)
    x = x * scale
    if x.size == 2 and x[0] != x[1]:
        lo, hi = float(x.min()), float(x.max())
        dec = _ci_decimals((hi - lo) / 2)
        return f"{_fmt_fixed(float(x.mean()), dec)} (range {_fmt_fixed(lo, dec)}–{_fmt_fixed(hi, dec)}, 2 seeds)"
    iv = t_interval(x, confidence)
    return format_mean_ci(iv.mean, iv.half_width, fallback_decimals=fallback_decimals)


def format_p(p: Optional[float], *, missing: str = "n/a") -> str:
    """A p-value for a table: two significant digits, ``"<0.001"`` below 0.001, ``missing`` when ``None``."""
    if _is_missing(p):
        return missing
    p = float(p)
    if p < 0.001:
        return "<0.001"
    return f"{round_sig(p, 2):.3g}"
