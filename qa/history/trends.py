"""Trend views of the history: a unit's metric over months, judged and under control rules.

For one unit, one phantom and one metric, :func:`unit_trends` gathers the stored series
(and optionally the session being analysed, not yet recorded), and gives each point

- the **baseline in force** (see below), its value, SD and count;
- the **limits of a profile** as absolute values: acceptance levels as they are, constancy
  levels converted around the baseline (``baseline * (1 -/+ level)`` for a fraction,
  ``baseline -/+ level`` for an amount; only in the worse direction unless the metric is
  a ``band`` metric), and its verdict from :func:`qa.judge.verdict.judge`;
- **Shewhart individuals limits** from the baseline period (the sessions the baseline was
  set from): centre their mean, sigma their mean moving range over d2 = 1.128;
- the **Western Electric run rules** and the **EWMA** chart (lambda = 0.2, L = 2.962) of
  :mod:`qa.history.control`, applied to the points the baseline governs, in order.

Which baseline governs a point: every baseline stored for the unit and phantom starts at
the acquisition of its earliest session (its baseline period begins there); a point is
governed by the most recently *set* baseline that started at or before the point was
acquired. So a baseline governs its own sessions and everything after them until a newer
baseline starts, sessions recorded after the fact find the baseline they belong to, and a
baseline set again from older sessions replaces the one before it. For a new session this
is the baseline in force now (:meth:`History.baseline`). Each governed stretch is a
:class:`BaselinePeriod`; the EWMA restarts at each.

Points are re-judged with the profile given (not the verdicts stored at the time), so the
limit lines drawn and the flags agree.

References
----------
.. [1] D. C. Montgomery, *Introduction to Statistical Quality Control*, 6th ed., Wiley,
   2009: individuals chart, run rules and EWMA (see :mod:`qa.history.control`).
.. [2] Western Electric Company, *Statistical Quality Control Handbook*, 1956.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import TYPE_CHECKING, Sequence

from ..errors import InputError
from ..judge.profile import Limit, Profile
from ..judge.verdict import acceptance_text, constancy_text, judge
from ..measure.base import Measurement
from .control import (RULES, ControlLimits, EwmaChart, apply_rules, ewma,
                      individuals_limits)
from .db import History

if TYPE_CHECKING:  # pragma: no cover
    from ..session import SessionResult

OUTSIDE_ACTION = "outside action limit"
OUTSIDE_WARNING = "outside warning limit"
#: Every flag a point can carry, most severe first: the profile's limits, then the rules.
FLAGS = (OUTSIDE_ACTION, OUTSIDE_WARNING) + RULES

__all__ = ["OUTSIDE_ACTION", "OUTSIDE_WARNING", "FLAGS", "LimitLine", "BaselinePeriod",
           "TrendPoint", "MetricTrend", "UnitTrends", "unit_trends", "metric_trend",
           "limit_lines"]


@dataclass(frozen=True)
class LimitLine:
    """One absolute limit: ``level`` warning/action, ``kind`` acceptance/constancy,
    ``side`` low (values below it are outside) or high (values above it are outside)."""

    level: str
    kind: str
    side: str
    value: float


@dataclass(frozen=True)
class BaselinePeriod:
    """A baseline and the points it governs, ``points[first:stop]`` of its trend.

    ``value``/``sd``/``n`` are this metric's baseline (``None``/0 when the metric was not
    measured in the baseline sessions). ``control`` is ``None`` when the individuals
    limits cannot be computed; ``control_note`` then says why. ``ewma`` is the EWMA chart
    of the governed points (``None`` without control limits).
    """

    baseline_id: int
    set_at: str
    reason: str
    session_ids: tuple[int, ...]
    starts: str
    value: float | None
    sd: float | None
    n: int
    control: ControlLimits | None
    control_note: str
    constancy: tuple[LimitLine, ...]
    first: int
    stop: int
    ewma: EwmaChart | None


@dataclass(frozen=True)
class TrendPoint:
    """One measured value of the trend, with its verdict and flags (see :data:`FLAGS`).

    ``session_id`` is ``None`` for the current session (not recorded yet); ``period`` the
    index of the governing :class:`BaselinePeriod` (``None`` before any baseline);
    ``verdict`` is ``pass``/``warning``/``fail`` against the profile (``pass`` when the
    profile has no limit for the metric).
    """

    session_id: int | None
    acquired: str
    value: float
    uncertainty: float | None
    period: int | None
    in_baseline: bool
    verdict: str
    flags: tuple[str, ...]

    @property
    def current(self) -> bool:
        return self.session_id is None


@dataclass(frozen=True)
class MetricTrend:
    """The trend of one metric of one unit with one phantom."""

    unit_id: str
    phantom: str
    metric: str
    unit: str
    points: tuple[TrendPoint, ...]
    periods: tuple[BaselinePeriod, ...]
    acceptance: tuple[LimitLine, ...]
    limit_text: str
    limit_source: str
    not_measured: int
    note: str = ""

    def flagged(self) -> tuple[TrendPoint, ...]:
        return tuple(p for p in self.points if p.flags)

    def count(self, flag: str) -> int:
        return sum(flag in p.flags for p in self.points)

    @property
    def latest(self) -> TrendPoint | None:
        return self.points[-1] if self.points else None

    def lines_for(self, point: TrendPoint) -> tuple[LimitLine, ...]:
        """The limits in force for a point: acceptance, and its baseline's constancy."""
        extra = () if point.period is None else self.periods[point.period].constancy
        return self.acceptance + extra


@dataclass(frozen=True)
class UnitTrends:
    """The trends of every metric of a unit with one phantom."""

    unit_id: str
    phantom: str
    profile: str | None
    n_sessions: int
    metrics: tuple[MetricTrend, ...]

    def get(self, metric: str) -> MetricTrend:
        for t in self.metrics:
            if t.metric == metric:
                return t
        raise KeyError(metric)


def limit_lines(limit: Limit | None, *, baseline: float | None = None,
                kind: str) -> tuple[LimitLine, ...]:
    """The absolute limit lines of one limit: ``kind`` ``"acceptance"`` or ``"constancy"``.

    Notes
    -----
    Constancy levels are turned into values around the baseline :math:`b` as
    :func:`qa.judge.verdict.judge` applies them: a fraction :math:`f` gives
    :math:`b - f|b|` (higher is better), :math:`b + f|b|` (lower is better) or both
    (band); an amount :math:`a` gives :math:`b \\mp a` likewise. A fraction of a zero
    baseline is undefined and gives no line.
    """
    if limit is None:
        return ()
    sides = {"higher": ("low",), "lower": ("high",), "band": ("low", "high")}[limit.better]
    out = []
    if kind == "acceptance" and limit.acceptance is not None:
        for level in ("warning", "action"):
            v = getattr(limit.acceptance, level)
            for side in sides:
                value = v[0 if side == "low" else 1] if limit.better == "band" else v
                out.append(LimitLine(level, kind, side, float(value)))
    elif kind == "constancy" and limit.constancy is not None and baseline is not None:
        if limit.constancy_as == "fraction" and baseline == 0:
            return ()
        for level in ("warning", "action"):
            step = float(getattr(limit.constancy, level))
            if limit.constancy_as == "fraction":
                step *= abs(baseline)
            for side in sides:
                out.append(LimitLine(level, kind, side,
                                     baseline - step if side == "low" else baseline + step))
    return tuple(out)


def _governing(starts: Sequence[str | None], acquired: str) -> int | None:
    """Index of the most recently set baseline that started at or before ``acquired``."""
    chosen = None
    for i, start in enumerate(starts):
        if start is not None and start <= acquired:
            chosen = i
    return chosen


def _current_samples(current, unit_id: str, phantom: str):
    if current.unit_id != unit_id or current.phantom.name != phantom:
        raise InputError(f"the current session is of unit '{current.unit_id}', phantom "
                         f"'{current.phantom.name}', not '{unit_id}', '{phantom}'",
                         field="current")
    acquired = str(current.meta.get("acquired", current.date))
    return acquired, {j.measurement.name: j.measurement for j in current.judged}


def _trend(metric: str, unit: str, samples, baselines, starts, limit: Limit | None, *,
           unit_id: str, phantom: str, not_measured: int) -> MetricTrend:
    """One metric's trend from ``samples`` = [(session_id, acquired, value, u)]."""
    governing = [_governing(starts, s[1]) for s in samples]
    # Stored points come in date order, so this only matters for the current session
    # (always last, whatever its date): it never goes back to an older baseline.
    for k in range(1, len(governing)):
        prev = governing[k - 1]
        if prev is not None and (governing[k] is None or governing[k] < prev):
            governing[k] = prev
    periods, index_of = [], {}
    for k, g in enumerate(governing):
        if g is None:
            continue
        if g not in index_of:
            index_of[g] = len(periods)
            periods.append([g, k, k + 1])
        else:
            periods[index_of[g]][2] = k + 1
    built, point_flags = [], [[] for _ in samples]
    for g, first, stop in periods:
        b = baselines[g]
        bv = b.values.get(metric)
        in_base = set(b.session_ids)
        base_values = [s[2] for s in samples if s[0] in in_base]  # in acquisition order
        control, note, chart = None, "", None
        if bv is None:
            note = "not measured in the baseline sessions: no baseline, no control limits"
        else:
            try:
                control = individuals_limits(base_values)
            except InputError as exc:
                note = f"no control limits: {exc.message}"
        values = [s[2] for s in samples[first:stop]]
        if control is not None:
            for k, rules in enumerate(apply_rules(values, control)):
                point_flags[first + k].extend(rules)
            chart = ewma(values, centre=control.centre, sigma=control.sigma)
        built.append(BaselinePeriod(
            b.id, b.set_at, b.reason, b.session_ids, starts[g],
            None if bv is None else bv.value, None if bv is None else bv.sd,
            0 if bv is None else bv.n, control, note,
            limit_lines(limit, baseline=None if bv is None else bv.value, kind="constancy"),
            first, stop, chart))
    points = []
    for k, (sid, acquired, value, u) in enumerate(samples):
        g = governing[k]
        period = None if g is None else index_of[g]
        base = None if period is None else built[period].value
        verdict = "pass"
        if limit is not None:
            verdict = judge(Measurement(metric, value, unit, u), limit, base).verdict
        by_verdict = {"fail": (OUTSIDE_ACTION,), "warning": (OUTSIDE_WARNING,)}
        flags = by_verdict.get(verdict, ()) + tuple(point_flags[k])
        in_base = period is not None and sid in built[period].session_ids
        points.append(TrendPoint(sid, acquired, float(value), u, period, in_base, verdict,
                                 flags))
    text = "" if limit is None else " · ".join(
        t for t in (acceptance_text(limit), constancy_text(limit)) if t)
    note = "" if built else "no baseline set for this unit and phantom: no control limits"
    return MetricTrend(unit_id, phantom, metric, unit, tuple(points), tuple(built),
                       limit_lines(limit, kind="acceptance"), text,
                       "" if limit is None else limit.source, not_measured, note)


def unit_trends(history: History, unit_id: str, *, phantom: str | None = None,
                metrics: Sequence[str] | None = None, profile: Profile | None = None,
                current: "SessionResult | None" = None) -> UnitTrends:
    """The trends of a unit's metrics with one phantom.

    Parameters
    ----------
    history : History
        An open history database.
    unit_id : str
        The unit.
    phantom : str, optional
        The phantom's name; needed only when the unit was checked with several.
    metrics : sequence of str, optional
        The metrics to trend (default: every metric measured at least once, in the order
        the logs list them).
    profile : Profile, optional
        Limits to draw and judge every point against (none when omitted).
    current : SessionResult, optional
        A session of the same unit and phantom not yet recorded; it is the last point.

    Returns
    -------
    UnitTrends

    Raises
    ------
    InputError
        No stored session of the unit (or of the unit with that phantom), several
        phantoms and none chosen, an unknown metric, a metric stored in two units or in
        a unit other than the profile's.
    """
    stored = history.sessions(unit_id=unit_id)
    where = str(history.path)
    if not stored:
        known = ", ".join(u.unit_id for u in history.units()) or "none"
        raise InputError(f"no sessions of unit '{unit_id}' in the history (units: {known})",
                         source=where)
    phantoms = sorted({s.phantom for s in stored})
    if phantom is None:
        if len(phantoms) > 1:
            raise InputError(f"unit '{unit_id}' was checked with phantoms "
                             f"{', '.join(phantoms)}; choose one", source=where,
                             field="phantom")
        phantom = phantoms[0]
    sessions = [s for s in stored if s.phantom == phantom]
    if not sessions:
        raise InputError(f"no sessions of unit '{unit_id}' with phantom '{phantom}' "
                         f"(its phantoms: {', '.join(phantoms)})", source=where,
                         field="phantom")
    rows = [(s.id, s.acquired, {m.name: m for m in history.measurements(s.id)})
            for s in sessions]
    if current is not None:
        acquired, figures = _current_samples(current, unit_id, phantom)
        rows.append((None, acquired, figures))
    order: dict[str, None] = {}
    for _, _, figures in rows:
        for name, m in figures.items():
            if m.value is not None:
                order.setdefault(name, None)
    if metrics is None:
        metrics = list(order)
    else:
        metrics = list(dict.fromkeys(metrics))
        unknown = [m for m in metrics if m not in order]
        if unknown:
            raise InputError(f"metric(s) {', '.join(unknown)} never measured for unit "
                             f"'{unit_id}' with phantom '{phantom}' (measured: "
                             f"{', '.join(order) or 'none'})", source=where, field="metric")
    baselines = history.baseline_history(unit_id, phantom)
    acquired_of = {s.id: s.acquired for s in sessions}
    starts = [min((acquired_of[i] for i in b.session_ids if i in acquired_of), default=None)
              for b in baselines]
    trends = []
    for metric in metrics:
        samples = [(sid, acq, figs[metric].value, figs[metric].uncertainty)
                   for sid, acq, figs in rows
                   if metric in figs and figs[metric].value is not None]
        missing = sum(1 for _, _, figs in rows
                      if metric in figs and figs[metric].value is None)
        units = sorted({figs[metric].unit for _, _, figs in rows if metric in figs})
        if len(units) > 1:
            raise InputError(f"metric '{metric}' is stored in units {', '.join(units)}; "
                             "a trend needs one", source=where, field="metric")
        limit = None if profile is None else profile.limit_for(metric)
        if limit is not None and limit.unit != units[0]:
            raise InputError(f"the profile gives '{metric}' in '{limit.unit}', the history "
                             f"holds '{units[0]}'", source=profile.source,
                             field=f"limits.{limit.key}")
        trends.append(_trend(metric, units[0], samples, baselines, starts, limit,
                             unit_id=unit_id, phantom=phantom, not_measured=missing))
    return UnitTrends(unit_id, phantom, None if profile is None else profile.name,
                      len(sessions), tuple(trends))


def metric_trend(history: History, unit_id: str, metric: str, *,
                 phantom: str | None = None, profile: Profile | None = None,
                 current: "SessionResult | None" = None) -> MetricTrend:
    """The trend of one metric; see :func:`unit_trends` for the parameters."""
    return unit_trends(history, unit_id, phantom=phantom, metrics=[metric],
                       profile=profile, current=current).metrics[0]
