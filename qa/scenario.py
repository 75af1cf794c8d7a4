"""The demo's invented scenario: a year of monthly checks of one unit.

The Fenmoor Breast Screening Service (fictional) checks its static unit FEN-DBT-1 once a
month with Lacuna's digital phantom. Over the year the unit's detector slowly loses
resolution (its light spread grows) and gains electronic noise — a drift made up for the
demo, chosen so that the control rules flag it months before any action limit fails.
Every month is a real simulation: the phantom's noiseless transmissions are computed
once, then each month's exposure is detected with that month's detector state and a
fresh noise seed, reconstructed and measured.
"""

from __future__ import annotations

import dataclasses
import datetime as dt
from dataclasses import dataclass

from .simulate.acquire import detect
from .simulate.geometry import DbtGeometry

#: Unit facts of the demo's fictional unit.
UNIT = {"manufacturer": "Lacuna simulator", "model": "virtual DBT, mid arc",
        "serial": "FEN-DBT-1", "station": "FENMOOR-DBT1",
        "site": "Fenmoor Breast Screening Service (fictional)", "software": "sim 1.0"}
MONTHS = 12
BASELINE_MONTHS = 4
#: The detector is stable for the baseline months, then drifts each month (invented):
#: light spread SD (mm) and electronic noise (quanta per pixel).
BLUR_START_MM, BLUR_PER_MONTH_MM = 0.020, 0.0022
ELECTRONIC_PER_MONTH = 6.0


@dataclass(frozen=True)
class MonthlyCheck:
    index: int
    date: str
    blur_sd_mm: float
    electronic_sd: float
    seed: int


def _months_before(day: dt.date, n: int) -> dt.date:
    y, m = divmod(day.year * 12 + day.month - 1 - n, 12)
    return dt.date(y, m + 1, min(day.day, 28))


def year_of_checks(today: dt.date, *, seed: int = 2026) -> tuple[MonthlyCheck, ...]:
    """The twelve monthly checks ending ``today`` (the last one is today's)."""
    out = []
    for k in range(MONTHS):
        date = today if k == MONTHS - 1 else _months_before(today, MONTHS - 1 - k)
        drift = max(0, k - (BASELINE_MONTHS - 1))
        out.append(MonthlyCheck(k, date.isoformat(), BLUR_START_MM + BLUR_PER_MONTH_MM * drift,
                                ELECTRONIC_PER_MONTH * drift, seed + k))
    return tuple(out)


def geometry_for(geometry: DbtGeometry, check: MonthlyCheck) -> DbtGeometry:
    """The geometry with the detector in its state of that month."""
    det = dataclasses.replace(geometry.detector, blur_sd_mm=check.blur_sd_mm)
    return dataclasses.replace(geometry, detector=det, electronic_sd=check.electronic_sd)


def expose(transmissions, geometry: DbtGeometry, check: MonthlyCheck):
    """One month's projections from the phantom's expected transmissions."""
    return detect(transmissions, geometry_for(geometry, check), seed=check.seed)
