"""A stand-in for the batch's per-session function whose process dies on some sessions.

The batch tests put this folder on ``sys.path`` (which spawned worker processes inherit)
and swap it in for ``qa.batch.assess_task``; the workers import it from here by name.
Sessions whose file name starts with ``dies`` end their process at once, as a process
killed for memory or crashed in native code would; every other session is assessed.
"""

import os
from pathlib import Path

from qa.batch import assess_task

EXIT_CODE = 70


def assess_or_die(task):
    if Path(task.source).name.startswith("dies"):
        os._exit(EXIT_CODE)
    return assess_task(task)
