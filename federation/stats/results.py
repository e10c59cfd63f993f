"""Result objects returned by the statistics in :mod:`federation.stats`.

Both classes are frozen dataclasses that serialise to JSON-safe dictionaries (the store and the report
read them back with :meth:`from_dict`). A quantity that is undefined for the data at hand (for example a
prediction interval from fewer than three studies) is ``None``, never NaN or infinity, because neither is
valid JSON.
"""

from __future__ import annotations

import math
from dataclasses import asdict, dataclass, fields
from typing import Any

__all__ = ["Interval", "PooledEstimate"]


def _check_finite_or_none(owner: str, name: str, value: float | None) -> None:
    if value is None:
        return
    if isinstance(value, bool) or not isinstance(value, (int, float)):
        raise TypeError(f"{owner}.{name} must be a number or None, got {type(value).__name__}")
    if not math.isfinite(value):
        raise ValueError(f"{owner}.{name} is {value!r}; use None for an undefined quantity")


def _format(value: float | None, digits: int = 4) -> str:
    return "undefined" if value is None else f"{value:.{digits}f}"


def _percent(level: float) -> str:
    return f"{100 * level:g}%"


def _from_dict(cls: type, data: dict[str, Any]) -> dict[str, Any]:
    known = {f.name for f in fields(cls)}
    unknown = set(data) - known
    if unknown:
        raise ValueError(f"{cls.__name__}: unknown field(s) {sorted(unknown)}")
    return dict(data)


@dataclass(frozen=True)
class Interval:
    """A point estimate with a two-sided confidence interval.

    Attributes
    ----------
    estimate : float or None
        Point estimate (``None`` if undefined).
    ci_low, ci_high : float or None
        Confidence limits (``None`` if undefined).
    method : str
        How the interval was computed, including any continuity correction that was applied.
    level : float
        Confidence level, for example 0.95.
    """

    estimate: float | None
    ci_low: float | None
    ci_high: float | None
    method: str
    level: float = 0.95

    def __post_init__(self) -> None:
        for name in ("estimate", "ci_low", "ci_high"):
            _check_finite_or_none("Interval", name, getattr(self, name))
        if not 0.0 < self.level < 1.0:
            raise ValueError(f"Interval.level must lie strictly between 0 and 1, got {self.level}")

    def to_dict(self) -> dict[str, Any]:
        """Return a JSON-safe dictionary of the fields."""
        return asdict(self)

    @classmethod
    def from_dict(cls, data: dict[str, Any]) -> Interval:
        """Rebuild an :class:`Interval` from :meth:`to_dict` output."""
        return cls(**_from_dict(cls, data))

    def summary(self) -> str:
        """One line: estimate and interval, with the method."""
        return (
            f"{_format(self.estimate)} ({_percent(self.level)} CI {_format(self.ci_low)} to "
            f"{_format(self.ci_high)}; {self.method})"
        )


@dataclass(frozen=True)
class PooledEstimate:
    """A pooled (meta-analytic) estimate with its heterogeneity statistics.

    Attributes
    ----------
    method : str
        Estimator of the between-study variance: ``"FE"`` (fixed effect), ``"DL"``, ``"REML"`` or ``"PM"``.
    estimate, se : float
        Pooled estimate on the analysis scale and its standard error (the Knapp–Hartung standard
        error when ``interval_method == "hksj"``).
    ci_low, ci_high : float
        Confidence interval for the pooled estimate.
    tau2 : float
        Between-study variance tau² (0 for the fixed-effect model, by assumption).
    tau2_ci_low, tau2_ci_high : float or None
        Q-profile confidence interval for tau² (Viechtbauer 2007); ``None`` for the fixed-effect model.
    i2 : float or None
        I² as a proportion in [0, 1] (multiply by 100 for the usual percentage).
    h2 : float or None
        H² (1 means no heterogeneity beyond sampling error).
    q, q_df, q_pvalue : float, int, float
        Cochran's Q, its degrees of freedom (k − 1) and its chi-squared p-value.
    pi_low, pi_high : float or None
        Prediction interval for the effect in a new study; ``None`` when undefined (k < 3 or
        fixed-effect model).
    n_studies : int
        Number of studies (sites) pooled.
    interval_method : str
        ``"wald"`` (normal quantile) or ``"hksj"`` (Hartung–Knapp–Sidik–Jonkman, t on k − 1 df).
    notes : tuple of str
        Anything a reader should know: truncation of tau² at zero, fallbacks, empty intervals.
    level : float
        Confidence level of ``ci_*``, ``tau2_ci_*`` and ``pi_*``.
    """

    method: str
    estimate: float
    se: float
    ci_low: float
    ci_high: float
    tau2: float
    tau2_ci_low: float | None
    tau2_ci_high: float | None
    i2: float | None
    h2: float | None
    q: float
    q_df: int
    q_pvalue: float
    pi_low: float | None
    pi_high: float | None
    n_studies: int
    interval_method: str
    notes: tuple[str, ...] = ()
    level: float = 0.95

    def __post_init__(self) -> None:
        for f in fields(self):
            if f.name in {"method", "interval_method", "notes", "q_df", "n_studies"}:
                continue
            _check_finite_or_none("PooledEstimate", f.name, getattr(self, f.name))
        for name in ("estimate", "se", "ci_low", "ci_high", "tau2", "q", "q_pvalue"):
            if getattr(self, name) is None:
                raise ValueError(f"PooledEstimate.{name} is required and cannot be None")
        if not isinstance(self.notes, tuple) or not all(isinstance(n, str) for n in self.notes):
            raise TypeError("PooledEstimate.notes must be a tuple of strings")
        if not 0.0 < self.level < 1.0:
            raise ValueError(f"PooledEstimate.level must lie strictly between 0 and 1, got {self.level}")

    def to_dict(self) -> dict[str, Any]:
        """Return a JSON-safe dictionary of the fields (``notes`` becomes a list)."""
        data = asdict(self)
        data["notes"] = list(self.notes)
        return data

    @classmethod
    def from_dict(cls, data: dict[str, Any]) -> PooledEstimate:
        """Rebuild a :class:`PooledEstimate` from :meth:`to_dict` output."""
        values = _from_dict(cls, data)
        values["notes"] = tuple(values.get("notes", ()))
        return cls(**values)

    def summary(self) -> str:
        """A short multi-line text summary, in the order a reader of a forest plot expects."""
        level = _percent(self.level)
        interval = "Wald (normal)" if self.interval_method == "wald" else "Hartung-Knapp-Sidik-Jonkman (t)"
        i2 = "undefined" if self.i2 is None else f"{100 * self.i2:.2f}%"
        lines = [
            f"Pooled estimate ({self.method}, k = {self.n_studies}, {interval} interval)",
            f"  estimate  {_format(self.estimate)}  SE {_format(self.se)}",
            f"  {level} CI    {_format(self.ci_low)} to {_format(self.ci_high)}",
            f"  {level} PI    {_format(self.pi_low)} to {_format(self.pi_high)}",
            (
                f"  tau^2     {_format(self.tau2)} ({level} CI {_format(self.tau2_ci_low)} to "
                f"{_format(self.tau2_ci_high)})"
            ),
            f"  I^2       {i2}  H^2 {_format(self.h2, 2)}",
            f"  Q         {self.q:.4f} on {self.q_df} df, p = {self.q_pvalue:.4g}",
        ]
        lines.extend(f"  note: {note}" for note in self.notes)
        return "\n".join(lines)
