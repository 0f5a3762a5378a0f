"""Parameter tables: declaration, defaults and validation.

Every stage declares its parameters as a tuple of :class:`Param`. The survey
configuration supplies one TOML table per stage; :func:`validate_table` merges
it with the defaults and refuses unknown keys, wrong types and out-of-range
values with a one-line message that names the key and what is allowed.
"""

from __future__ import annotations

import difflib
from dataclasses import dataclass, field
from typing import Any

__all__ = ["Param", "ParameterError", "validate_table", "describe", "closest"]


class ParameterError(ValueError):
    """A configuration value that the user must correct (one-line message)."""


_TYPE_NAMES = {
    bool: "true or false",
    int: "an integer",
    float: "a number",
    str: "a string",
    list: "a list",
    dict: "a table",
}


@dataclass(frozen=True)
class Param:
    """Declaration of one stage parameter.

    Parameters
    ----------
    name : str
        Key in the stage's TOML table. Put the unit in the name where it helps
        (``threshold_nT``, ``window_m``).
    default : object
        Value used when the key is absent. ``None`` means "not set" and is only
        allowed when ``optional`` is true.
    doc : str
        One sentence for the documentation, with the unit.
    kind : type
        Expected Python type after TOML parsing: bool, int, float, str, list or dict.
        An int is accepted where a float is expected.
    minimum, maximum : float, optional
        Inclusive bounds for numbers (or for the length of a list).
    exclusive_minimum : bool
        When true the minimum itself is refused (for "strictly positive").
    choices : tuple of str, optional
        Allowed values of a string parameter, or of each item of a list.
    item_kind : type, optional
        Type of each list item.
    optional : bool
        Whether ``None`` (key absent, no default) is allowed.
    """

    name: str
    default: Any
    doc: str
    kind: type = float
    minimum: float | None = None
    maximum: float | None = None
    exclusive_minimum: bool = False
    choices: tuple[str, ...] | None = None
    item_kind: type | None = None
    optional: bool = False

    def allowed(self) -> str:
        """Describe the allowed values in words."""
        words = _TYPE_NAMES.get(self.kind, self.kind.__name__)
        if self.choices is not None:
            words = "one of " + ", ".join(repr(c) for c in self.choices)
            if self.kind is list:
                words = "a list of " + words
        parts = [words]
        if self.minimum is not None:
            op = ">" if self.exclusive_minimum else ">="
            what = "length " if self.kind is list else ""
            parts.append(f"{what}{op} {self.minimum:g}")
        if self.maximum is not None:
            what = "length " if self.kind is list else ""
            parts.append(f"{what}<= {self.maximum:g}")
        return ", ".join(parts)

    def check(self, value: Any, where: str) -> Any:
        """Return ``value`` converted to the declared type, or raise."""
        key = f"{where}.{self.name}" if where else self.name
        if value is None:
            if self.optional:
                return None
            raise ParameterError(f"{key} is required: give {self.allowed()}")
        kind_ok = isinstance(value, self.kind)
        if self.kind is float and isinstance(value, int) and not isinstance(value, bool):
            value, kind_ok = float(value), True
        if self.kind in (int, float) and isinstance(value, bool):
            kind_ok = False
        if not kind_ok:
            raise ParameterError(
                f"{key} = {value!r} has the wrong type: expected {self.allowed()}"
            )
        if self.kind in (int, float):
            self._check_range(key, value, value)
        if self.kind is list:
            self._check_range(key, len(value), value)
            for i, item in enumerate(value):
                if self.item_kind is not None:
                    ok = isinstance(item, self.item_kind)
                    if self.item_kind is float and isinstance(item, int) and not isinstance(item, bool):
                        ok = True
                    if not ok:
                        raise ParameterError(
                            f"{key}[{i}] = {item!r} has the wrong type: expected "
                            f"{_TYPE_NAMES.get(self.item_kind, self.item_kind.__name__)}"
                        )
                if self.choices is not None and item not in self.choices:
                    raise ParameterError(f"{key}[{i}] = {item!r} is not allowed: expected {self.allowed()}")
        elif self.choices is not None and value not in self.choices:
            hint = closest(str(value), self.choices)
            extra = f" (did you mean {hint!r}?)" if hint else ""
            raise ParameterError(f"{key} = {value!r} is not allowed: expected {self.allowed()}{extra}")
        return value

    def _check_range(self, key: str, number: float, shown: Any) -> None:
        low_bad = self.minimum is not None and (
            number < self.minimum or (self.exclusive_minimum and number == self.minimum)
        )
        high_bad = self.maximum is not None and number > self.maximum
        if low_bad or high_bad:
            raise ParameterError(f"{key} = {shown!r} is out of range: expected {self.allowed()}")


def closest(name: str, candidates) -> str | None:
    """Return the candidate most like ``name``, or None when nothing is close."""
    match = difflib.get_close_matches(name, list(candidates), n=1, cutoff=0.6)
    return match[0] if match else None


def validate_table(params: tuple[Param, ...], table: dict | None, where: str) -> dict:
    """Merge a TOML table with the declared defaults and validate every key.

    Parameters
    ----------
    params : tuple of Param
        The declarations.
    table : dict or None
        The user's table (may be empty or absent).
    where : str
        Name of the table, used in messages (for example ``"spikes"``).

    Returns
    -------
    dict
        Every declared key with its validated value.

    Raises
    ------
    ParameterError
        On an unknown key (with the closest known key), a wrong type or an
        out-of-range value.
    """
    table = dict(table or {})
    known = {p.name: p for p in params}
    for key in table:
        if key not in known:
            hint = closest(key, known)
            extra = f"; did you mean {hint!r}?" if hint else ""
            choices = ", ".join(sorted(known)) or "none"
            raise ParameterError(
                f"unknown key {where}.{key}{extra} (known keys of [{where}]: {choices})"
            )
    out = {}
    for p in params:
        out[p.name] = p.check(table.get(p.name, p.default), where)
    return out


def describe(params: tuple[Param, ...]) -> list[dict]:
    """Rows describing each parameter (for documentation and ``lodeline params``)."""
    return [
        {"key": p.name, "default": p.default, "optional": p.optional, "allowed": p.allowed(), "doc": p.doc}
        for p in params
    ]
