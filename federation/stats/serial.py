"""JSON round-trip and finiteness checks shared by the result objects of the pooling modules.

A result class is a frozen dataclass that inherits :class:`ResultRecord`. Its fields may be numbers,
strings, booleans, ``None``, tuples, dicts with string keys, or other result records (including
:class:`~federation.stats.results.Interval` and :class:`~federation.stats.results.PooledEstimate`). On
construction every float anywhere inside is checked to be finite (an undefined quantity is ``None``,
never NaN, because NaN is not JSON); :meth:`ResultRecord.to_dict` gives plain JSON types and
:meth:`ResultRecord.from_dict` rebuilds an equal object from them, guided by the type hints.
"""

from __future__ import annotations

import dataclasses
import math
import types
import typing
from dataclasses import dataclass
from typing import Any, Self, TypeVar, get_args, get_origin, get_type_hints

__all__ = ["PoolingError", "ResultRecord", "SiteExclusion"]

T = TypeVar("T")


class PoolingError(ValueError):
    """Input that the pooling methods cannot use: too few sites, a non-finite value, a zero variance.

    The message names the site (by its identifier, never a count) and the rule that was broken.
    """


def _check_finite(owner: str, path: str, value: Any) -> None:
    if isinstance(value, bool) or value is None or isinstance(value, str | int):
        return
    if isinstance(value, float):
        if not math.isfinite(value):
            raise ValueError(f"{owner}.{path} is {value!r}; an undefined quantity must be None")
        return
    if isinstance(value, tuple):
        for i, item in enumerate(value):
            _check_finite(owner, f"{path}[{i}]", item)
        return
    if isinstance(value, dict):
        for key, item in value.items():
            _check_finite(owner, f"{path}.{key}", item)
        return
    if dataclasses.is_dataclass(value):
        return  # nested records check themselves when they are built
    raise TypeError(f"{owner}.{path}: {type(value).__name__} is not a JSON-safe result value")


def _encode(value: Any) -> Any:
    if dataclasses.is_dataclass(value) and not isinstance(value, type):
        to_dict = getattr(value, "to_dict", None)
        if to_dict is not None:
            return to_dict()
        return {f.name: _encode(getattr(value, f.name)) for f in dataclasses.fields(value)}
    if isinstance(value, tuple | list):
        return [_encode(v) for v in value]
    if isinstance(value, dict):
        return {str(k): _encode(v) for k, v in value.items()}
    return value


def _decode(hint: Any, value: Any, where: str) -> Any:
    origin = get_origin(hint)
    if hint is Any:
        return value
    if origin in (typing.Union, types.UnionType):
        options = get_args(hint)
        if value is None:
            if type(None) in options:
                return None
            raise ValueError(f"{where}: null is not allowed")
        for option in options:
            if option is type(None):
                continue
            try:
                return _decode(option, value, where)
            except (TypeError, ValueError):
                continue
        raise ValueError(f"{where}: value does not match {hint}")
    if origin is tuple:
        if not isinstance(value, list | tuple):
            raise ValueError(f"{where}: expected a list")
        args = get_args(hint)
        if len(args) == 2 and args[1] is Ellipsis:
            return tuple(_decode(args[0], v, f"{where}[{i}]") for i, v in enumerate(value))
        if len(args) != len(value):
            raise ValueError(f"{where}: expected {len(args)} items")
        return tuple(_decode(a, v, f"{where}[{i}]") for i, (a, v) in enumerate(zip(args, value, strict=True)))
    if origin is dict:
        if not isinstance(value, dict):
            raise ValueError(f"{where}: expected an object")
        _, value_hint = get_args(hint)
        return {str(k): _decode(value_hint, v, f"{where}.{k}") for k, v in value.items()}
    if isinstance(hint, type) and dataclasses.is_dataclass(hint):
        if not isinstance(value, dict):
            raise ValueError(f"{where}: expected an object")
        return hint.from_dict(value)  # type: ignore[attr-defined]
    if hint is float:
        if isinstance(value, bool) or not isinstance(value, int | float):
            raise ValueError(f"{where}: expected a number")
        return float(value)
    if hint is int:
        if isinstance(value, bool) or not isinstance(value, int):
            raise ValueError(f"{where}: expected an integer")
        return value
    if hint is bool:
        if not isinstance(value, bool):
            raise ValueError(f"{where}: expected true or false")
        return value
    if hint is str:
        if not isinstance(value, str):
            raise ValueError(f"{where}: expected text")
        return value
    raise TypeError(f"{where}: cannot decode type {hint!r}")


class ResultRecord:
    """Mixin for frozen dataclasses: finiteness check on construction, ``to_dict`` and ``from_dict``."""

    def __post_init__(self) -> None:
        owner = type(self).__name__
        for f in dataclasses.fields(self):  # type: ignore[arg-type]
            _check_finite(owner, f.name, getattr(self, f.name))

    def to_dict(self) -> dict[str, Any]:
        """A dictionary of plain JSON types (tuples become lists)."""
        return {f.name: _encode(getattr(self, f.name)) for f in dataclasses.fields(self)}  # type: ignore[arg-type]

    def summary(self) -> str:
        """A short text rendering, one field per line (result classes with more structure override it)."""
        lines = [type(self).__name__]
        for f in dataclasses.fields(self):  # type: ignore[arg-type]
            value = getattr(self, f.name)
            if isinstance(value, float):
                text = f"{value:.4g}"
            elif isinstance(value, tuple) and len(value) > 6:
                text = f"{len(value)} values"
            elif dataclasses.is_dataclass(value):
                text = value.summary().replace("\n", "\n    ") if hasattr(value, "summary") else str(value)
            else:
                text = str(value)
            lines.append(f"  {f.name}: {text}")
        return "\n".join(lines)

    @classmethod
    def from_dict(cls, data: dict[str, Any]) -> Self:
        """Rebuild the record from :meth:`to_dict` output; unknown or missing fields are an error."""
        if not isinstance(data, dict):
            raise ValueError(f"{cls.__name__}: expected an object")
        hints = get_type_hints(cls)
        names = {f.name for f in dataclasses.fields(cls)}  # type: ignore[arg-type]
        unknown = set(data) - names
        if unknown:
            raise ValueError(f"{cls.__name__}: unknown field(s) {sorted(unknown)}")
        values = {name: _decode(hints[name], value, f"{cls.__name__}.{name}") for name, value in data.items()}
        return cls(**values)


@dataclass(frozen=True)
class SiteExclusion(ResultRecord):
    """A site that was left out of a pooled estimate, and why (the reason never holds a count)."""

    site_id: str
    reason: str
