"""The judging stage: threshold profiles and verdicts."""

from .profile import Levels, Limit, Profile, load_profile
from .verdict import VERDICTS, Judged, judge, judge_all, overall

__all__ = ["Levels", "Limit", "Profile", "load_profile", "VERDICTS", "Judged", "judge",
           "judge_all", "overall"]
