"""The history stage: an SQLite record of QA sessions, units and baselines, and the
statistical control rules that trend views apply to it.

:class:`History` stores and reads sessions (:mod:`qa.history.db`, schema and migrations
in :mod:`qa.history.schema`); the records it takes and returns are in
:mod:`qa.history.records`; :mod:`qa.history.control` holds the Shewhart individuals
chart, the Western Electric run rules and the EWMA chart.
"""

from .control import (RULES, ControlLimits, EwmaChart, apply_rules, ewma,
                      individuals_limits, western_electric)
from .db import SCHEMA_VERSION, History
from .records import (KINDS, UNIT_INFO_KEYS, VERDICTS, BaselineValue, MeasurementRecord,
                      SeriesPoint, SessionRecord, StoredBaseline, StoredSession, UnitRecord,
                      unit_info_from)

#: File name of the history database inside the output folder.
DEFAULT_FILE_NAME = "history.sqlite"

__all__ = ["History", "SCHEMA_VERSION", "DEFAULT_FILE_NAME", "MeasurementRecord",
           "SessionRecord", "StoredSession", "UnitRecord", "BaselineValue", "StoredBaseline",
           "SeriesPoint", "VERDICTS", "KINDS", "UNIT_INFO_KEYS", "unit_info_from",
           "RULES", "ControlLimits", "EwmaChart", "individuals_limits", "western_electric",
           "ewma", "apply_rules"]
