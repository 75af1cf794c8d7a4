"""Judging measurements against a profile's limits, and the overall verdict.

Verdicts are plain words: ``pass``, ``warning``, ``fail`` (an action level crossed) and
``not measured``. Acceptance levels compare the value itself; constancy levels compare
its change from the unit's baseline, in the worse direction for ``higher``/``lower``
metrics and either way for ``band`` metrics. The verdict of a metric is the worse of
the two. A metric with a limit that could not be measured makes the overall verdict at
least ``warning``: somebody has to look at why.

A measured figure that no level was applied to (no limit in the profile, or only a
constancy limit and no baseline) keeps the verdict ``pass`` for the JSON contract, but
its :attr:`Judged.judged` is False and the log reports it as such, never as a pass.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Mapping

from ..measure.base import Measurement
from .profile import Limit, Profile

VERDICTS = ("pass", "warning", "fail", "not measured")
_RANK = {"pass": 0, "warning": 1, "fail": 2}


@dataclass(frozen=True)
class Judged:
    """One measurement with its limit, baseline and verdict."""

    measurement: Measurement
    verdict: str
    limit: Limit | None = None
    limit_text: str = ""
    baseline: float | None = None
    change: float | None = None        # value - baseline, in the metric's unit
    reason: str = ""
    judged: bool = True                # False when no level was applied to the value

    @property
    def shown(self) -> str:
        """The verdict as the log words it: the verdict itself when a level was applied
        or the figure is missing, else ``no limit`` (none in the profile) or
        ``not judged`` (only a constancy limit, and no baseline)."""
        if self.judged or self.verdict == "not measured":
            return self.verdict
        return "no limit" if self.limit is None else "not judged"

    @property
    def name(self) -> str:
        return self.measurement.name


def _fmt(v) -> str:
    return f"{v:.4g}"


def acceptance_text(limit: Limit) -> str:
    lv = limit.acceptance
    if lv is None:
        return ""
    if limit.better == "band":
        return (f"warn outside {_fmt(lv.warning[0])}–{_fmt(lv.warning[1])}, "
                f"act outside {_fmt(lv.action[0])}–{_fmt(lv.action[1])}")
    word = "below" if limit.better == "higher" else "above"
    return f"warn {word} {_fmt(lv.warning)}, act {word} {_fmt(lv.action)}"


def constancy_text(limit: Limit) -> str:
    lv = limit.constancy
    if lv is None:
        return ""
    if limit.constancy_as == "fraction":
        w, a = f"{100 * lv.warning:.3g} %", f"{100 * lv.action:.3g} %"
    else:
        w, a = f"{_fmt(lv.warning)} {limit.unit}", f"{_fmt(lv.action)} {limit.unit}"
    way = {"higher": "drop", "lower": "rise", "band": "change"}[limit.better]
    return f"baseline {way}: warn > {w}, act > {a}"


def _acceptance_verdict(limit: Limit, value: float) -> str:
    lv = limit.acceptance
    if limit.better == "band":
        if not lv.action[0] <= value <= lv.action[1]:
            return "fail"
        return "pass" if lv.warning[0] <= value <= lv.warning[1] else "warning"
    sign = 1.0 if limit.better == "higher" else -1.0
    if sign * value < sign * lv.action:
        return "fail"
    return "warning" if sign * value < sign * lv.warning else "pass"


def _constancy_verdict(limit: Limit, value: float, baseline: float) -> tuple[str, str]:
    lv = limit.constancy
    change = value - baseline
    if limit.constancy_as == "fraction":
        if baseline == 0:
            return "pass", "baseline is 0: a relative change is undefined, constancy not judged"
        change = change / abs(baseline)
    worse = {"higher": -change, "lower": change, "band": abs(change)}[limit.better]
    if worse > lv.action:
        return "fail", ""
    return ("warning" if worse > lv.warning else "pass"), ""


def judge(measurement: Measurement, limit: Limit | None,
          baseline: float | None = None) -> Judged:
    """The verdict of one measurement."""
    if not measurement.measured:
        text = " · ".join(t for t in (acceptance_text(limit), constancy_text(limit)) if t) \
            if limit else ""
        return Judged(measurement, "not measured", limit, text, baseline, judged=False)
    if limit is None:
        return Judged(measurement, "pass", None, "no limit set", baseline,
                      None if baseline is None else measurement.value - baseline,
                      "no limit in the profile", judged=False)
    verdicts, texts, reason = [], [], ""
    if limit.acceptance is not None:
        verdicts.append(_acceptance_verdict(limit, measurement.value))
        texts.append(acceptance_text(limit))
    if limit.constancy is not None:
        texts.append(constancy_text(limit))
        if baseline is None:
            reason = "no baseline stored: constancy not judged"
        else:
            v, reason = _constancy_verdict(limit, measurement.value, baseline)
            verdicts.append(v)
    verdict = max(verdicts, key=_RANK.get) if verdicts else "pass"
    change = None if baseline is None else measurement.value - baseline
    return Judged(measurement, verdict, limit, " · ".join(texts), baseline, change, reason,
                  judged=bool(verdicts))


def judge_all(measurements, profile: Profile,
              baselines: Mapping[str, float] | None = None) -> tuple[Judged, ...]:
    baselines = baselines or {}
    return tuple(judge(m, profile.limit_for(m.name), baselines.get(m.name))
                 for m in measurements)


def overall(judged) -> str:
    """``fail`` if any action level is crossed, ``warning`` if any warning level is, or
    a limited metric was not measured; else ``pass``."""
    worst = "pass"
    for j in judged:
        v = j.verdict
        if v == "not measured":
            v = "warning" if j.limit is not None else "pass"
        if _RANK[v] > _RANK[worst]:
            worst = v
    return worst
