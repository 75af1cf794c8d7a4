"""Safe YAML reading that remembers where every value came from.

Phantom definitions, geometry profiles and threshold profiles are YAML files written by
hand; when one of their fields is wrong the message must name the file, the line and the
field. :func:`load_yaml` builds plain values whose mappings are :class:`Located` dicts
that know the line of each key, and :class:`Fields` reads them with typed accessors that
raise :class:`~qa.errors.InputError` carrying that location.

Only YAML's safe subset is accepted: a tag such as ``!!python/object`` is refused.
"""

from __future__ import annotations

from pathlib import Path
from typing import Any, Iterable

import yaml

from .errors import InputError


class Located(dict):
    """A dict from YAML that remembers the 1-based line of each key and of itself."""

    line: int = 0
    key_lines: dict

    def line_of(self, key) -> int:
        return self.key_lines.get(key, self.line)


class LocatedList(list):
    line: int = 0
    item_lines: list


class _Loader(yaml.SafeLoader):
    pass


def _construct_mapping(loader: _Loader, node: yaml.MappingNode) -> Located:
    loader.flatten_mapping(node)
    out = Located()
    out.line = node.start_mark.line + 1
    out.key_lines = {}
    for key_node, value_node in node.value:
        key = loader.construct_object(key_node, deep=True)
        if key in out:
            raise InputError(f"key '{key}' appears twice", source=loader.name,
                             line=key_node.start_mark.line + 1, field=str(key))
        out[key] = loader.construct_object(value_node, deep=True)
        out.key_lines[key] = key_node.start_mark.line + 1
    return out


def _construct_sequence(loader: _Loader, node: yaml.SequenceNode) -> LocatedList:
    out = LocatedList(loader.construct_object(child, deep=True) for child in node.value)
    out.line = node.start_mark.line + 1
    out.item_lines = [child.start_mark.line + 1 for child in node.value]
    return out


_Loader.add_constructor(yaml.resolver.BaseResolver.DEFAULT_MAPPING_TAG, _construct_mapping)
_Loader.add_constructor(yaml.resolver.BaseResolver.DEFAULT_SEQUENCE_TAG, _construct_sequence)


def load_yaml(path) -> Located:
    """Read a YAML file whose top level is a mapping.

    Raises
    ------
    InputError
        The file is missing or unreadable, is not valid YAML, uses a tag outside YAML's
        safe subset, or its top level is not a mapping.
    """
    path = Path(path)
    try:
        text = path.read_text(encoding="utf-8")
    except FileNotFoundError:
        raise InputError("file not found", source=str(path)) from None
    except IsADirectoryError:
        raise InputError("expected a YAML file, found a folder", source=str(path)) from None
    except (OSError, UnicodeDecodeError) as exc:
        raise InputError(f"cannot read: {exc}", source=str(path)) from None
    loader = _Loader(text)
    loader.name = str(path)
    try:
        doc = loader.get_single_data()
    except yaml.constructor.ConstructorError as exc:
        mark = exc.problem_mark
        raise InputError(f"YAML tag not allowed here (only plain YAML is read): {exc.problem}",
                         source=str(path), line=mark.line + 1 if mark else None) from None
    except yaml.MarkedYAMLError as exc:
        mark = exc.problem_mark or exc.context_mark
        raise InputError(f"not valid YAML: {exc.problem or exc.context}", source=str(path),
                         line=mark.line + 1 if mark else None) from None
    except yaml.YAMLError as exc:
        raise InputError(f"not valid YAML: {exc}", source=str(path)) from None
    finally:
        loader.dispose()
    if not isinstance(doc, Located):
        raise InputError("expected a mapping of fields at the top level", source=str(path), line=1)
    return doc


_MISSING = object()


class Fields:
    """Typed, located access to one YAML mapping.

    Parameters
    ----------
    mapping : Located
        The mapping read by :func:`load_yaml`.
    source : str
        The file name, for messages.
    prefix : str
        Dotted path of this mapping inside the file (``objects[2]``), for messages.
    """

    def __init__(self, mapping: Any, source: str, prefix: str = ""):
        if not isinstance(mapping, dict):
            raise InputError(f"expected a mapping of fields, got {type(mapping).__name__}",
                             source=source, line=getattr(mapping, "line", None),
                             field=prefix or None)
        self.map = mapping
        self.source = source
        self.prefix = prefix
        self._used: set = set()

    # --- locations ------------------------------------------------------------------
    def name(self, key: str) -> str:
        return f"{self.prefix}.{key}" if self.prefix else key

    def line(self, key: str | None = None) -> int | None:
        if isinstance(self.map, Located):
            return self.map.line_of(key) if key is not None else self.map.line
        return None

    def error(self, key: str | None, message: str) -> InputError:
        return InputError(message, source=self.source, line=self.line(key),
                          field=self.name(key) if key else (self.prefix or None))

    # --- accessors ------------------------------------------------------------------
    def has(self, key: str) -> bool:
        return key in self.map

    def raw(self, key: str, default: Any = _MISSING) -> Any:
        self._used.add(key)
        if key not in self.map:
            if default is _MISSING:
                raise self.error(None, f"missing required field '{self.name(key)}'")
            return default
        return self.map[key]

    def text(self, key: str, default: Any = _MISSING) -> str:
        value = self.raw(key, default)
        if value is default and default is not _MISSING:
            return value
        if not isinstance(value, str) or not value.strip():
            raise self.error(key, f"expected a non-empty text, got {value!r}")
        return value

    def number(self, key: str, default: Any = _MISSING, *, positive: bool = False,
               minimum: float | None = None, maximum: float | None = None) -> float:
        value = self.raw(key, default)
        if value is default and default is not _MISSING:
            return value
        if isinstance(value, bool) or not isinstance(value, (int, float)):
            raise self.error(key, f"expected a number, got {value!r}")
        value = float(value)
        if positive and not value > 0:
            raise self.error(key, f"expected a positive number, got {value:g}")
        if minimum is not None and value < minimum:
            raise self.error(key, f"expected at least {minimum:g}, got {value:g}")
        if maximum is not None and value > maximum:
            raise self.error(key, f"expected at most {maximum:g}, got {value:g}")
        return value

    def integer(self, key: str, default: Any = _MISSING, *, minimum: int | None = None) -> int:
        value = self.raw(key, default)
        if value is default and default is not _MISSING:
            return value
        if isinstance(value, bool) or not isinstance(value, int):
            raise self.error(key, f"expected a whole number, got {value!r}")
        if minimum is not None and value < minimum:
            raise self.error(key, f"expected at least {minimum}, got {value}")
        return int(value)

    def vector(self, key: str, length: int, default: Any = _MISSING, *,
               positive: bool = False) -> tuple[float, ...]:
        value = self.raw(key, default)
        if value is default and default is not _MISSING:
            return value
        if (not isinstance(value, list) or len(value) != length or
                any(isinstance(v, bool) or not isinstance(v, (int, float)) for v in value)):
            raise self.error(key, f"expected a list of {length} numbers, got {value!r}")
        if positive and any(v <= 0 for v in value):
            raise self.error(key, f"expected {length} positive numbers, got {value!r}")
        return tuple(float(v) for v in value)

    def numbers(self, key: str, default: Any = _MISSING) -> tuple[float, ...]:
        value = self.raw(key, default)
        if value is default and default is not _MISSING:
            return value
        if (not isinstance(value, list) or not value or
                any(isinstance(v, bool) or not isinstance(v, (int, float)) for v in value)):
            raise self.error(key, f"expected a non-empty list of numbers, got {value!r}")
        return tuple(float(v) for v in value)

    def choice(self, key: str, options: Iterable[str], default: Any = _MISSING) -> str:
        options = tuple(options)
        value = self.raw(key, default)
        if value is default and default is not _MISSING:
            return value
        if value not in options:
            raise self.error(key, f"expected one of {', '.join(options)}; got {value!r}")
        return value

    def boolean(self, key: str, default: Any = _MISSING) -> bool:
        value = self.raw(key, default)
        if not isinstance(value, bool):
            raise self.error(key, f"expected true or false, got {value!r}")
        return value

    def sub(self, key: str, default: Any = _MISSING) -> "Fields":
        value = self.raw(key, default)
        if value is default and default is not _MISSING:
            return Fields({}, self.source, self.name(key))
        return Fields(value, self.source, self.name(key))

    def items(self, key: str) -> list["Fields"]:
        """The entries of a list of mappings, each as :class:`Fields`."""
        value = self.raw(key)
        if not isinstance(value, list) or not value:
            raise self.error(key, f"expected a non-empty list, got {value!r}")
        return [Fields(v, self.source, f"{self.name(key)}[{i}]") for i, v in enumerate(value)]

    def reject_unknown(self) -> None:
        """Refuse keys that were never read: they are almost always misspellings."""
        for key in self.map:
            if key not in self._used:
                raise self.error(key, f"unknown field '{self.name(key)}'")
