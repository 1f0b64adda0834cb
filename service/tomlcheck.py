"""Reading a TOML table key by key: each value checked where it is read, with its full key.

Generic (no beamtap sections here; those are in :mod:`.config`): numbers
with ranges, whole numbers, strings with choices, booleans, lists, pairs,
sub-tables; nil is never taken as "absent"; unknown keys are refused. Every
failure is a :class:`beamtap.errors.ConfigError` naming the file, the key,
the value and what was expected.
"""

from __future__ import annotations

import math

from beamtap.errors import ConfigError

_REQUIRED = object()


def key_text(name) -> str:
    """A key as an error message shows it: plain names as they are, anything else (a key sent with
    a line break, quotes or spaces) quoted, so that every message stays on one line."""
    name = str(name)
    return name if name.replace("_", "a").replace("-", "a").isalnum() and name.isascii() else repr(name)


class _Table:
    def __init__(self, data: dict, where: str, path: str):
        self.data, self.where, self.path = data, where, path
        self.used: set[str] = set()

    def key(self, name: str) -> str:
        return f"{self.path}.{key_text(name)}" if self.path else key_text(name)

    def fail(self, name: str, value, expected: str):
        shown = "missing" if value is _REQUIRED else "got nil" if value is None else f"got {value!r}"
        raise ConfigError(self.where, self.key(name), f"{shown}, expected {expected}")

    def has(self, name: str) -> bool:
        return name in self.data

    def raw(self, name: str, default=_REQUIRED, expected: str = "a value"):
        self.used.add(name)
        if name not in self.data:
            if default is _REQUIRED:
                self.fail(name, _REQUIRED, expected)
            return default
        v = self.data[name]
        if v is None:  # msgpack nil (control requests): never taken as "absent"
            self.fail(name, None, expected)
        return v

    def number(self, name, default=_REQUIRED, low=None, high=None, low_open=False, unit=""):
        expected = _range_text("a number", low, high, low_open, unit)
        v = self.raw(name, default, expected)
        if v is None:
            return None
        if isinstance(v, bool) or not isinstance(v, (int, float)) or not math.isfinite(v):
            self.fail(name, v, expected)
        if (low is not None and (v < low or (low_open and v == low))) or (high is not None and v > high):
            self.fail(name, v, expected)
        return float(v)

    def integer(self, name, default=_REQUIRED, low=None, high=None):
        expected = _range_text("a whole number", low, high, False, "")
        v = self.raw(name, default, expected)
        if v is None:
            return None
        if isinstance(v, bool) or not isinstance(v, int) or (low is not None and v < low) or (
                high is not None and v > high):
            self.fail(name, v, expected)
        return int(v)

    def string(self, name, default=_REQUIRED, choices=None):
        expected = "one of " + ", ".join(repr(c) for c in choices) if choices else "a string"
        v = self.raw(name, default, expected)
        if v is None:
            return None
        if not isinstance(v, str) or (choices and v not in choices):
            self.fail(name, v, expected)
        return v

    def boolean(self, name, default=_REQUIRED):
        v = self.raw(name, default, "true or false")
        if not isinstance(v, bool):
            self.fail(name, v, "true or false")
        return v

    def numbers(self, name, default=_REQUIRED, length=None, expected=None):
        expected = expected or (f"a list of {length} numbers" if length else "a list of numbers")
        v = self.raw(name, default, expected)
        if v is None:
            return None
        if not isinstance(v, list) or any(isinstance(e, bool) or not isinstance(e, (int, float))
                                          or not math.isfinite(e) for e in v):
            self.fail(name, v, expected)
        if length is not None and len(v) != length:
            self.fail(name, v, expected)
        return [float(e) for e in v]

    def pairs(self, name, default=_REQUIRED, width=2, expected=None):
        expected = expected or f"a list of [{', '.join(['number'] * width)}] lists"
        v = self.raw(name, default, expected)
        if v is None:
            return None
        if not isinstance(v, list) or any(
                not isinstance(row, list) or len(row) != width
                or any(isinstance(e, bool) or not isinstance(e, (int, float)) or not math.isfinite(e)
                       for e in row) for row in v):
            self.fail(name, v, expected)
        return [[float(e) for e in row] for row in v]

    def table(self, name, default=_REQUIRED) -> "_Table | None":
        v = self.raw(name, default, "a table")
        if v is None:
            return None
        if not isinstance(v, dict):
            self.fail(name, v, "a table")
        return _Table(v, self.where, self.key(name))

    def tables(self, name) -> list["_Table"]:
        v = self.raw(name, [], "an array of tables")
        if not isinstance(v, list) or any(not isinstance(e, dict) for e in v):
            self.fail(name, v, f"an array of tables ([[{self.key(name)}]])")
        return [_Table(e, self.where, f"{self.key(name)}[{i}]") for i, e in enumerate(v)]

    def one_of(self, names) -> str:
        present = [n for n in names if n in self.data]
        if len(present) != 1:
            shown = "none" if not present else " and ".join(present)
            raise ConfigError(self.where, self.path or "(top level)",
                              f"got {shown}, expected exactly one of {', '.join(names)}")
        return present[0]

    def done(self):
        unknown = sorted(set(self.data) - self.used)
        if unknown:
            raise ConfigError(self.where, self.key(unknown[0]),
                              f"unknown key, expected one of {', '.join(sorted(self.used)) or '(none)'}")


def _range_text(what, low, high, low_open, unit):
    unit = f" {unit}" if unit else ""
    if low is not None and high is not None:
        if low_open:
            return f"{what} > {low:g}{unit} and <= {high:g}{unit}"
        return f"{what} from {low:g}{unit} to {high:g}{unit}"
    if low is not None:
        return f"{what} {'>' if low_open else '>='} {low:g}{unit}"
    if high is not None:
        return f"{what} <= {high:g}{unit}"
    return what
