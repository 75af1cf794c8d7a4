"""Threshold profiles (YAML under ``thresholds/``): acceptance and constancy limits.

A profile names the phantoms (and optionally geometries) it applies to and, per metric,
an ``acceptance`` limit (absolute) and/or a ``constancy`` limit (relative to the unit's
stored baseline), each with a warning and an action level, and the source of the limit
as text. Which way is better comes from the metric's declaration (``higher``, ``lower``
or ``band``), so the levels are checked to lie on the right side of each other when the
profile loads. A key may end in ``*`` to cover one figure per test object
(``sdnr_*``); an exact key wins over a pattern.
"""

from __future__ import annotations

import fnmatch
from dataclasses import dataclass
from pathlib import Path

from ..errors import InputError
from ..measure.base import find_spec
from ..yamlio import Fields, load_yaml


@dataclass(frozen=True)
class Levels:
    """Warning and action levels.

    For ``higher``/``lower`` metrics each is a number (acceptance: the value itself;
    constancy: the allowed change in the worse direction). For ``band`` metrics an
    acceptance level is a ``(low, high)`` pair and a constancy level a number applied to
    the size of the change either way.
    """

    warning: object
    action: object


@dataclass(frozen=True)
class Limit:
    """The limits of one metric (or one metric pattern) in a profile."""

    key: str
    unit: str
    better: str
    source: str
    acceptance: Levels | None = None
    constancy: Levels | None = None
    constancy_as: str = "fraction"     # "fraction" of the baseline, or "amount" in unit
    line: int = 0

    def matches(self, metric: str) -> bool:
        return fnmatch.fnmatchcase(metric, self.key)


@dataclass(frozen=True)
class Profile:
    name: str
    description: str
    phantoms: tuple[str, ...]
    geometries: tuple[str, ...]
    limits: tuple[Limit, ...]
    source: str = ""
    phantoms_line: int = 0             # lines of applies_to.phantoms / .geometries
    geometries_line: int = 0

    def limit_for(self, metric: str) -> Limit | None:
        for limit in self.limits:
            if limit.key == metric:
                return limit
        for limit in self.limits:
            if limit.matches(metric):
                return limit
        return None

    def check_applies(self, *, phantom: str, geometry: str | None = None) -> None:
        """Refuse a phantom or an acquisition geometry outside the profile's scope.

        Parameters
        ----------
        phantom : str
            The phantom's name (``phantom:`` of its definition).
        geometry : str, optional
            The name of the geometry profile the volume was acquired with (simulated
            volumes carry it in their metadata). ``None`` or ``""`` when it is unknown,
            as for a scanner's DICOM: the geometry is then not checked (see
            :meth:`geometry_note`).

        Raises
        ------
        InputError
            The profile names phantoms (geometries) and this one is not among them; the
            message names the profile file and the ``applies_to`` field.
        """
        if self.phantoms and phantom not in self.phantoms:
            raise InputError(f"profile '{self.name}' is for phantom(s) {', '.join(self.phantoms)}, "
                             f"not '{phantom}'", source=self.source,
                             line=self.phantoms_line or None, field="applies_to.phantoms")
        if geometry and self.geometries and geometry not in self.geometries:
            raise InputError(f"profile '{self.name}' is for geometr(ies) "
                             f"{', '.join(self.geometries)}, not '{geometry}'",
                             source=self.source, line=self.geometries_line or None,
                             field="applies_to.geometries")

    def geometry_note(self, geometry: str | None) -> str:
        """A note for the user when the profile's geometries could not be checked.

        Parameters
        ----------
        geometry : str or None
            The volume's geometry name, ``None`` or ``""`` when unknown.

        Returns
        -------
        str
            Empty when the profile names no geometries or ``geometry`` is known;
            otherwise one sentence saying the scope was not checked.
        """
        if not self.geometries or geometry:
            return ""
        return (f"the volume does not state its acquisition geometry, so the scope of "
                f"profile '{self.name}' ({', '.join(self.geometries)}) was not checked")


def _levels(f: Fields, key: str, better: str, kind: str) -> tuple[Levels, str]:
    """Read one ``acceptance`` or ``constancy`` block; returns the levels and, for
    constancy, whether they are a ``fraction`` of the baseline or an ``amount``."""
    sub = f.sub(key)
    relative_as = sub.choice("as", ("fraction", "amount"), "fraction") \
        if kind == "constancy" else ""
    if better == "band" and kind == "acceptance":
        warn, act = (sub.vector(k, 2) for k in ("warning", "action"))
        for name, (lo, hi) in (("warning", warn), ("action", act)):
            if not hi > lo:
                raise sub.error(name, f"expected [low, high] with high > low, got [{lo:g}, {hi:g}]")
        if not (act[0] <= warn[0] and warn[1] <= act[1]):
            raise sub.error("warning", f"the warning band {list(warn)} must lie inside the "
                            f"action band {list(act)}")
    else:
        warn = sub.number("warning", minimum=0.0 if kind == "constancy" else None)
        act = sub.number("action", minimum=0.0 if kind == "constancy" else None)
        if kind == "constancy" or better == "lower":
            wrong = warn > act
            side = "at or below"
        else:
            wrong = warn < act
            side = "at or above"
        if wrong:
            raise sub.error("warning", f"the warning level ({warn:g}) must be {side} the action "
                            f"level ({act:g}) for a metric where {better} is better"
                            if kind == "acceptance" else
                            f"the warning change ({warn:g}) must not exceed the action change "
                            f"({act:g})")
    sub.reject_unknown()
    return Levels(warn, act), relative_as


def load_profile(path) -> Profile:
    """Read and check a threshold profile.

    Raises
    ------
    InputError
        Unknown metric names, unit mismatches, missing or misordered levels, unknown
        fields; the message names the file, line and field.
    """
    path = Path(path)
    doc = Fields(load_yaml(path), str(path))
    name = doc.text("profile")
    description = doc.text("description", "")
    applies = doc.sub("applies_to", {})
    phantoms = tuple(applies.raw("phantoms", []) or [])
    geometries = tuple(applies.raw("geometries", []) or [])
    for key, values in (("phantoms", phantoms), ("geometries", geometries)):
        if not all(isinstance(v, str) for v in values):
            raise applies.error(key, "expected a list of names")
    applies.reject_unknown()
    limits_map = doc.raw("limits")
    if not isinstance(limits_map, dict) or not limits_map:
        raise doc.error("limits", "expected a mapping of metric names to their limits")
    limits = []
    lines = getattr(limits_map, "key_lines", {})
    for key in limits_map:
        where = Fields(limits_map, str(path), "limits")
        spec = find_spec(str(key))
        if spec is None:
            raise InputError(f"unknown metric '{key}' (no metric family declares it)",
                             source=str(path), line=lines.get(key), field=f"limits.{key}")
        f = where.sub(key)
        unit = f.text("unit")
        if unit != spec.unit:
            raise f.error("unit", f"metric '{key}' is measured in '{spec.unit}', "
                          f"the profile says '{unit}'")
        source = f.text("source")
        acceptance = constancy = None
        constancy_as = "fraction"
        if f.has("acceptance"):
            acceptance, _ = _levels(f, "acceptance", spec.better, "acceptance")
        if f.has("constancy"):
            constancy, constancy_as = _levels(f, "constancy", spec.better, "constancy")
        if acceptance is None and constancy is None:
            raise InputError(f"metric '{key}' needs an 'acceptance' or a 'constancy' limit",
                             source=str(path), line=lines.get(key), field=f"limits.{key}")
        f.reject_unknown()
        limits.append(Limit(str(key), unit, spec.better, source, acceptance, constancy,
                            constancy_as, lines.get(key, 0)))
    doc.reject_unknown()
    return Profile(name, description, phantoms, geometries, tuple(limits), str(path),
                   phantoms_line=(applies.line("phantoms") or 0) if phantoms else 0,
                   geometries_line=(applies.line("geometries") or 0) if geometries else 0)
