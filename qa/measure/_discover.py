"""Import every module of :mod:`qa.measure` so that each family registers itself.

Adding a metric therefore means adding one module here; nothing else imports it by name.
"""

import importlib
import pkgutil

from . import __name__ as _package, __path__ as _path

for _info in pkgutil.iter_modules(_path):
    if not _info.name.startswith("_") and _info.name != "base":
        importlib.import_module(f"{_package}.{_info.name}")
