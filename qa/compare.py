"""Before/after comparison of one unit with one phantom, e.g. around a software update.

Each side is a set of repeated acquisitions (sessions in the history, or figures measured
from volumes). Per metric, :func:`compare_metric` gives the difference of the means
(after minus before), its confidence interval, whether the difference exceeds the
measurement noise (the interval excludes 0) and whether it exceeds the profile's
constancy limit (the before mean taken as the baseline, judged as
:func:`qa.judge.verdict.judge` does), and a verdict in words.

The interval is Welch's t interval by default: it does not assume equal spread on both
sides. On request a percentile bootstrap is used instead, and the result says so. With
fewer than two values on a side neither gives an interval: the result says "not
computable" and why.

References
----------
.. [1] B. L. Welch, "The generalization of 'Student's' problem when several different
   population variances are involved", Biometrika 34(1/2), 1947.
.. [2] F. E. Satterthwaite, "An approximate distribution of estimates of variance
   components", Biometrics Bulletin 2(6), 1946.
.. [3] B. Efron and R. J. Tibshirani, *An Introduction to the Bootstrap*, Chapman & Hall,
   1993: the two-sample bootstrap and the percentile interval (chapters 8 and 13).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, replace
from typing import Mapping, Sequence

import numpy as np
from scipy import stats

from .errors import InputError
from .judge.profile import Limit, Profile
from .judge.verdict import constancy_text, judge
from .measure.base import Measurement

METHODS = ("welch", "bootstrap")
_RANK = {"pass": 0, "warning": 1, "fail": 2}

__all__ = ["METHODS", "MetricComparison", "Comparison", "welch_interval",
           "bootstrap_interval", "compare_metric", "compare_figures", "compare_sessions"]


def _values(x, name: str) -> np.ndarray:
    a = np.asarray(x, dtype=float).ravel()
    if not np.all(np.isfinite(a)):
        raise InputError("values must be finite numbers", field=name)
    return a


def _check_level(level: float) -> float:
    if not 0.0 < level < 1.0:
        raise InputError(f"the confidence level must lie between 0 and 1, got {level!r}",
                         field="level")
    return float(level)


def welch_interval(before, after, *, level: float = 0.95) -> tuple[float, float, float, float]:
    """Welch's t interval for ``mean(after) - mean(before)``.

    Parameters
    ----------
    before, after : (n,) array_like
        Repeated values of one metric on each side, at least two each.
    level : float
        Confidence level (default 0.95).

    Returns
    -------
    (difference, low, high, df) : floats
        The difference of the means, the interval and the Welch–Satterthwaite degrees of
        freedom.

    Raises
    ------
    InputError
        Fewer than two values on a side, or no spread on either side.

    Notes
    -----
    With sample means :math:`\\bar a, \\bar b`, sample variances :math:`s_a^2, s_b^2`
    and sizes :math:`n_a, n_b` (a = after, b = before):
    :math:`d = \\bar a - \\bar b`, :math:`v_a = s_a^2/n_a`, :math:`v_b = s_b^2/n_b`,
    :math:`SE = \\sqrt{v_a + v_b}`,
    :math:`\\nu = (v_a + v_b)^2 / (v_a^2/(n_a-1) + v_b^2/(n_b-1))` [1]_ [2]_, and the
    interval :math:`d \\pm t_{(1+level)/2,\\,\\nu}\\,SE`.
    """
    b, a = _values(before, "before"), _values(after, "after")
    level = _check_level(level)
    if a.size < 2 or b.size < 2:
        raise InputError(f"Welch's interval needs at least 2 values on each side, got "
                         f"{b.size} before and {a.size} after", field="sessions")
    va, vb = a.var(ddof=1) / a.size, b.var(ddof=1) / b.size
    if va + vb == 0:
        raise InputError("the values do not vary on either side: the measurement noise "
                         "cannot be estimated", field="sessions")
    d = float(a.mean() - b.mean())
    se = math.sqrt(va + vb)
    df = (va + vb) ** 2 / (va ** 2 / (a.size - 1) + vb ** 2 / (b.size - 1))
    half = float(stats.t.ppf(0.5 + level / 2, df)) * se
    return d, d - half, d + half, float(df)


def bootstrap_interval(before, after, *, level: float = 0.95, n_resamples: int = 10000,
                       seed: int = 0) -> tuple[float, float, float]:
    """Percentile bootstrap interval for ``mean(after) - mean(before)``.

    Each side is resampled with replacement on its own ([3]_, two-sample problem), the
    difference of the resampled means is formed ``n_resamples`` times, and the interval
    is its ``(1 - level)/2`` and ``(1 + level)/2`` quantiles. With few values per side
    the percentile interval is too narrow (it ignores that the spread itself is
    estimated); prefer Welch's interval there.

    Returns
    -------
    (difference, low, high) : floats

    Raises
    ------
    InputError
        Fewer than two values on a side.
    """
    b, a = _values(before, "before"), _values(after, "after")
    level = _check_level(level)
    if a.size < 2 or b.size < 2:
        raise InputError(f"a bootstrap needs at least 2 values on each side, got "
                         f"{b.size} before and {a.size} after", field="sessions")
    if n_resamples < 100:
        raise InputError(f"use at least 100 resamples, got {n_resamples}",
                         field="n_resamples")
    rng = np.random.default_rng(seed)
    ma = a[rng.integers(0, a.size, (n_resamples, a.size))].mean(axis=1)
    mb = b[rng.integers(0, b.size, (n_resamples, b.size))].mean(axis=1)
    low, high = np.quantile(ma - mb, [0.5 - level / 2, 0.5 + level / 2])
    return float(a.mean() - b.mean()), float(low), float(high)


@dataclass(frozen=True)
class MetricComparison:
    """One metric before and after.

    ``difference`` is ``mean(after) - mean(before)`` in ``unit``; ``interval`` its
    confidence interval and ``interval_method`` how it was found (or why not:
    ``"not computable"``, with ``note``). ``beyond_noise`` is True when the interval
    excludes 0. ``constancy`` is the verdict of the change against the profile's
    constancy limit (``pass``/``warning``/``fail``; empty without such a limit); it needs
    only the two means, so it is given even when the interval is not computable.
    ``limit`` is the profile's limit for the metric (``None`` without one).
    """

    metric: str
    unit: str
    before: tuple[float, ...]
    after: tuple[float, ...]
    difference: float | None
    interval: tuple[float, float] | None
    df: float | None
    interval_method: str
    beyond_noise: bool | None
    constancy: str
    limit_text: str
    verdict: str
    note: str = ""
    limit: Limit | None = None

    @property
    def mean_before(self):
        return float(np.mean(self.before)) if self.before else None

    @property
    def mean_after(self):
        return float(np.mean(self.after)) if self.after else None

    @property
    def sd_before(self):
        return float(np.std(self.before, ddof=1)) if len(self.before) > 1 else None

    @property
    def sd_after(self):
        return float(np.std(self.after, ddof=1)) if len(self.after) > 1 else None

    @property
    def mark(self) -> str:
        """A verdict word for the log's marks: the constancy verdict when there is one,
        else ``not measured`` when the interval is not computable, else ``no limit``
        (compared, but no constancy limit to judge the change by: no pass)."""
        if self.constancy:
            return self.constancy
        return "not measured" if self.interval is None else "no limit"


def _words(limit: Limit | None, d: float, beyond: bool, constancy: str) -> str:
    if not beyond:
        first = "no change beyond noise"
    elif limit is None or limit.better == "band":
        first = "changed"
    else:
        better = (d > 0) == (limit.better == "higher")
        first = "improved" if better else "worsened"
    second = {"pass": "within constancy limit", "warning": "beyond constancy warning",
              "fail": "beyond constancy action limit"}.get(constancy, "no constancy limit")
    return f"{first}; {second}"


def compare_metric(metric: str, before: Sequence[float], after: Sequence[float], *,
                   unit: str, limit: Limit | None = None, method: str = "welch",
                   level: float = 0.95, n_resamples: int = 10000,
                   seed: int = 0) -> MetricComparison:
    """Compare one metric's repeated values before and after.

    Parameters
    ----------
    metric, unit : str
        The metric's name and unit.
    before, after : sequence of float
        Its values on each side (not-measured values left out).
    limit : Limit, optional
        The profile's limit for the metric; only its constancy part is used.
    method : {"welch", "bootstrap"}
        How the interval is found (see :func:`welch_interval`,
        :func:`bootstrap_interval`).
    level : float
        Confidence level (default 0.95).
    n_resamples, seed : int
        Bootstrap resamples and seed (bootstrap only).

    Returns
    -------
    MetricComparison
    """
    if method not in METHODS:
        raise InputError(f"unknown method '{method}'; known: {', '.join(METHODS)}",
                         field="method")
    level = _check_level(level)  # bad options raise; too few values give "not computable"
    if method == "bootstrap" and n_resamples < 100:
        raise InputError(f"use at least 100 resamples, got {n_resamples}",
                         field="n_resamples")
    b, a = tuple(float(v) for v in _values(before, "before")), \
        tuple(float(v) for v in _values(after, "after"))
    text = "" if limit is None else constancy_text(limit)
    if limit is not None and limit.unit != unit:
        raise InputError(f"the profile gives '{metric}' in '{limit.unit}', the values are "
                         f"in '{unit}'", field=f"limits.{limit.key}")
    constancy, reason = "", ""
    if limit is not None and limit.constancy is not None and a and b:
        only = replace(limit, acceptance=None)
        j = judge(Measurement(metric, float(np.mean(a)), unit), only, float(np.mean(b)))
        constancy, reason = j.verdict, j.reason
    try:
        if method == "welch":
            d, lo, hi, df = welch_interval(b, a, level=level)
            how = f"Welch t, {100 * level:g} %"
        else:
            d, lo, hi = bootstrap_interval(b, a, level=level, n_resamples=n_resamples,
                                           seed=seed)
            df, how = None, (f"percentile bootstrap, {100 * level:g} % "
                             f"({n_resamples} resamples, seed {seed})")
    except InputError as exc:
        words = "not computable" if not constancy else \
            "interval not computable; " + _words(limit, 0.0, False, constancy).split("; ")[1]
        note = "; ".join(t for t in (exc.message, reason) if t)
        return MetricComparison(metric, unit, b, a,
                                float(np.mean(a) - np.mean(b)) if a and b else None, None,
                                None, "not computable", None, constancy, text, words, note,
                                limit)
    beyond = not (lo <= 0.0 <= hi)
    return MetricComparison(metric, unit, b, a, d, (lo, hi), df, how, beyond, constancy,
                            text, _words(limit, d, beyond, constancy), reason, limit)


@dataclass(frozen=True)
class Comparison:
    """A before/after comparison of one unit with one phantom.

    ``before_ids``/``after_ids`` are session ids (or volume file names);
    ``before_dates``/``after_dates`` their acquisition dates; ``before_software``/
    ``after_software`` the software versions recorded for them (may be empty).
    """

    unit_id: str
    phantom: str
    profile: str | None
    before_ids: tuple
    after_ids: tuple
    before_dates: tuple[str, ...]
    after_dates: tuple[str, ...]
    before_software: tuple[str, ...]
    after_software: tuple[str, ...]
    method: str
    level: float
    metrics: tuple[MetricComparison, ...]

    @property
    def overall(self) -> str:
        """The worst constancy verdict (``pass`` when no metric has one)."""
        marks = [m.constancy for m in self.metrics if m.constancy in _RANK]
        return max(marks, key=_RANK.get, default="pass")

    @property
    def exit_code(self) -> int:
        return 1 if self.overall == "fail" else 0

    def to_json(self) -> dict:
        def num(v):
            return None if v is None or not math.isfinite(v) else float(v)

        side = {"before": (self.before_ids, self.before_dates, self.before_software),
                "after": (self.after_ids, self.after_dates, self.after_software)}
        out = {"unit": self.unit_id, "phantom": self.phantom, "profile": self.profile,
               "method": self.method, "level": self.level, "overall": self.overall}
        for key, (ids, dates, soft) in side.items():
            out[key] = {"sessions": list(ids), "dates": list(dates), "software": list(soft)}
        out["metrics"] = {m.metric: {
            "unit": m.unit, "n_before": len(m.before), "n_after": len(m.after),
            "mean_before": num(m.mean_before), "sd_before": num(m.sd_before),
            "mean_after": num(m.mean_after), "sd_after": num(m.sd_after),
            "difference": num(m.difference),
            "ci_low": None if m.interval is None else num(m.interval[0]),
            "ci_high": None if m.interval is None else num(m.interval[1]),
            "df": num(m.df), "interval": m.interval_method, "beyond_noise": m.beyond_noise,
            "constancy": m.constancy or None, "limit": m.limit_text or None,
            "judged": bool(m.constancy), "verdict": m.verdict,
            "note": m.note} for m in self.metrics}
        return out


def compare_figures(unit_id: str, phantom: str, before: Sequence[Mapping],
                    after: Sequence[Mapping], *, before_ids: Sequence, after_ids: Sequence,
                    profile: Profile | None = None, method: str = "welch",
                    level: float = 0.95, seed: int = 0, before_dates=(), after_dates=(),
                    before_software=(), after_software=()) -> Comparison:
    """Compare figures of repeated acquisitions: one ``{name: figure}`` per acquisition.

    A figure is anything with ``value`` (``None`` when not measured) and ``unit``
    (a :class:`~qa.measure.base.Measurement` or a history ``MeasurementRecord``). Every
    metric measured on either side is compared, in the order first met.
    """
    if not before or not after:
        raise InputError("a comparison needs at least one acquisition on each side",
                         field="sessions")
    order: dict[str, str] = {}
    for figures in list(before) + list(after):
        for name, m in figures.items():
            if m.value is not None:
                if order.setdefault(name, m.unit) != m.unit:
                    raise InputError(f"metric '{name}' appears in units '{order[name]}' and "
                                     f"'{m.unit}'", field="sessions")
    results = []
    for name, unit in order.items():
        pick = [[f[name].value for f in side if name in f and f[name].value is not None]
                for side in (before, after)]
        limit = None if profile is None else profile.limit_for(name)
        results.append(compare_metric(name, pick[0], pick[1], unit=unit, limit=limit,
                                      method=method, level=level, seed=seed))
    return Comparison(unit_id, phantom, None if profile is None else profile.name,
                      tuple(before_ids), tuple(after_ids), tuple(before_dates),
                      tuple(after_dates), tuple(before_software), tuple(after_software),
                      method, float(level), tuple(results))


def compare_sessions(history, unit_id: str, before_ids: Sequence[int],
                     after_ids: Sequence[int], *, profile: Profile | None = None,
                     method: str = "welch", level: float = 0.95,
                     seed: int = 0) -> Comparison:
    """Compare stored sessions of one unit and phantom (see :func:`compare_figures`).

    Raises
    ------
    InputError
        An unknown session id, a session of another unit, sessions of several phantoms,
        a session on both sides, an empty side.
    """
    b_ids, a_ids = list(dict.fromkeys(before_ids)), list(dict.fromkeys(after_ids))
    both = sorted(set(b_ids) & set(a_ids))
    if both:
        raise InputError(f"session(s) {', '.join(map(str, both))} are on both sides",
                         source=str(history.path), field="sessions")
    records = {sid: history.load_session(sid) for sid in b_ids + a_ids}
    for sid, rec in records.items():
        if rec.unit_id != unit_id:
            raise InputError(f"session {sid} is of unit '{rec.unit_id}', not '{unit_id}'",
                             source=str(history.path), field="sessions")
    phantoms = sorted({r.phantom for r in records.values()})
    if len(phantoms) > 1:
        raise InputError(f"the sessions were made with different phantoms "
                         f"({', '.join(phantoms)}); compare one phantom at a time",
                         source=str(history.path), field="sessions")
    if profile is not None:
        profile.check_applies(phantom=phantoms[0])

    def side(ids):
        recs = [records[i] for i in ids]
        soft = tuple(dict.fromkeys(r.unit_info["software"] for r in recs
                                   if "software" in r.unit_info))
        return ([{m.name: m for m in r.measurements} for r in recs],
                tuple(r.acquired for r in recs), soft)

    (bf, bd, bs), (af, ad, as_) = side(b_ids), side(a_ids)
    return compare_figures(unit_id, phantoms[0], bf, af, before_ids=b_ids, after_ids=a_ids,
                           profile=profile, method=method, level=level, seed=seed,
                           before_dates=bd, after_dates=ad, before_software=bs,
                           after_software=as_)
