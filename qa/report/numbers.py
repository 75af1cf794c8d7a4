"""How the logs print numbers, units, changes from a baseline, dates and times.

One set of rules for every page: a value with its uncertainty to the decimal place of
the uncertainty's second significant digit; a value without one to three significant
digits; figures in tables never in exponent notation; a baseline to the decimals of the
value it is compared with; a change from the baseline in the terms of the metric's
constancy limit (per cent when the limit is relative).
"""

from __future__ import annotations

import math
import re

#: How units are printed in tables (the JSON keeps the units as measured).
UNIT_CELL = {"1": "—", "value": "vol. units"}
#: How units are printed after a number in running text.
UNIT_TEXT = {"1": "", "value": "(volume units)"}
#: What the table's unit words mean, for a note under the table.
UNIT_NOTES = {"value": "vol. units: the reconstruction's own grey-value units (volumes "
                       "are not calibrated in attenuation)",
              "1": "—: a ratio or index without a unit"}


def decimals_for(value, uncertainty=None) -> int:
    """The decimal places :func:`format_value` prints ``value`` with.

    Examples
    --------
    >>> decimals_for(3.14159, 0.0123), decimals_for(1234.5), decimals_for(0.0)
    (3, 0, 3)
    """
    if uncertainty is not None and uncertainty > 0:
        decimals = 1 - math.floor(math.log10(uncertainty))
    elif value is not None and value != 0:
        decimals = 2 - math.floor(math.log10(abs(value)))
    else:
        decimals = 3
    return int(min(10, max(0, decimals)))


def fixed(value: float, decimals: int, *, sign: bool = False) -> str:
    """``value`` to ``decimals`` places; a value that rounds to zero prints without a minus.

    Examples
    --------
    >>> fixed(-0.00001, 3), fixed(0.25, 1, sign=True), fixed(-1.26, 1, sign=True)
    ('0.000', '+0.2', '-1.3')
    """
    if round(value, decimals) == 0:
        value = 0.0
    return f"{value:{'+' if sign else ''}.{decimals}f}"


def format_value(value, uncertainty=None) -> str:
    """A value and its uncertainty rounded alike.

    With an uncertainty, both are given to the decimal place of the uncertainty's second
    significant digit (the usual way of quoting a result with its standard uncertainty);
    without one, the value has three significant digits.

    Examples
    --------
    >>> format_value(3.14159, 0.0123)
    '3.142 ± 0.012'
    >>> format_value(0.000123456, 0.0000045)
    '0.0001235 ± 0.0000045'
    >>> format_value(1234.5)
    '1234'
    """
    if value is None:
        return "—"
    decimals = decimals_for(value, uncertainty)
    text = fixed(value, decimals)
    if uncertainty is not None:
        text += f" ± {uncertainty:.{decimals}f}"
    return text


def significant(value, digits: int = 4) -> str:
    """``value`` to ``digits`` significant digits in fixed notation (never ``1e-05``).

    Examples
    --------
    >>> significant(5.993e-05), significant(1.6983), significant(1234.5), significant(None)
    ('0.00005993', '1.698', '1234', '—')
    """
    if value is None or not math.isfinite(value):
        return "—"
    if value == 0:
        return "0"
    decimals = int(min(12, max(0, digits - 1 - math.floor(math.log10(abs(value))))))
    return fixed(value, decimals)


def compact(value, digits: int = 4) -> str:
    """:func:`significant` without trailing zeros, for limits and levels set by hand.

    Examples
    --------
    >>> compact(7.0), compact(6.936), compact(-0.5), compact(0.00012)
    ('7', '6.936', '-0.5', '0.00012')
    """
    text = significant(value, digits)
    return text.rstrip("0").rstrip(".") if "." in text else text


def unit_cell(unit: str) -> str:
    """The unit as a table prints it (``—`` for a ratio, ``vol. units`` for grey values)."""
    return UNIT_CELL.get(unit, unit)


def with_unit(text: str, unit: str) -> str:
    """A number followed by its unit as running text prints it.

    Examples
    --------
    >>> with_unit("1.5", "mm"), with_unit("0.42", "1"), with_unit("3", "value")
    ('1.5 mm', '0.42', '3 (volume units)')
    """
    u = UNIT_TEXT.get(unit, unit)
    return f"{text} {u}" if u else text


def relative_limit(limit) -> bool:
    """True when ``limit`` has a constancy part given as a fraction of the baseline."""
    return (limit is not None and limit.constancy is not None
            and limit.constancy_as == "fraction")


def change_text(value, baseline, decimals: int, *, relative: bool) -> str:
    """The change from the baseline: in per cent (one decimal) when ``relative``, else in
    the metric's unit to ``decimals`` places; ``—`` when either is missing.

    Examples
    --------
    >>> change_text(1.6856, 1.6983, 4, relative=True)
    '-0.7 %'
    >>> change_text(0.0, -0.01, 4, relative=False)
    '+0.0100'
    """
    if value is None or baseline is None:
        return "—"
    if relative:
        if baseline == 0:
            return "—"
        return fixed(100.0 * (value - baseline) / abs(baseline), 1, sign=True) + " %"
    return fixed(value - baseline, decimals, sign=True)


def dedupe_words(text: str) -> str:
    """``text`` with a word repeated at once written once ("bead bead" -> "bead").

    Examples
    --------
    >>> dedupe_words("beads bead, b2; section of bead bead")
    'beads bead, b2; section of bead'
    """
    return re.sub(r"\b([A-Za-z]{3,}) \1\b", r"\1", text)


def clock(text) -> str:
    """A time of day as ``HH:MM:SS`` from DICOM ``HHMMSS.frac`` or ISO text ('' if none).

    Examples
    --------
    >>> clock("093015.250"), clock("20261202093015"), clock("2026-12-02T09:30:15"), clock("")
    ('09:30:15', '09:30:15', '09:30:15', '')
    """
    s = str(text or "").strip()
    iso = re.search(r"T?(\d{2}):(\d{2})(?::(\d{2}))?", s)
    if iso and ":" in s:
        return f"{iso.group(1)}:{iso.group(2)}:{iso.group(3) or '00'}"
    digits = s.split(".")[0]
    if len(digits) == 14 and digits.isdigit():      # DICOM DT: YYYYMMDDHHMMSS
        digits = digits[8:]
    if re.fullmatch(r"\d{2}(\d{2}(\d{2})?)?", digits):
        digits = digits.ljust(6, "0")
        return f"{digits[:2]}:{digits[2:4]}:{digits[4:6]}"
    return ""


def date_time(text) -> str:
    """An ISO date-time printed as ``YYYY-MM-DD HH:MM:SS`` (the date alone if no time).

    Examples
    --------
    >>> date_time("2026-12-02T06:20:10"), date_time("2026-12-02")
    ('2026-12-02 06:20:10', '2026-12-02')
    """
    s = str(text)
    t = clock(s[10:]) if len(s) > 10 else ""
    return f"{s[:10]} {t}".strip()
