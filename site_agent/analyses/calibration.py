"""Calibration of a probability model: binned observed and expected events, O/E, CITL and slope.

Per predicted-risk bin (cut at the request's edges, merged by :mod:`site_agent.banding` until events and
non-events are each 0 or at least k): the number of events and non-events. Every statistic is computed from
those released counts only, each bin's records placed at the bin's midpoint risk (open ends closed at 0 and
1): expected events per bin (count × midpoint) and in all (E), observed events O, O/E, and two logistic fits
on the linear predictor lp = logit(midpoint):

- calibration-in-the-large (CITL): logit P(y=1) = a + offset(lp); a = 0 when mean risk matches;
- calibration slope: logit P(y=1) = a + b·lp; b = 1 when predictions are neither too extreme nor too
  modest.

A statistic from record-level risks (a sum of predicted risks, a fit over individual records) would be a
further fact about the records that a crafted model could turn into a count; from the released bins it
tells nothing the bins do not. The cost is the grouping: finer bins give figures closer to the record-level
ones. Both fits are maximum-likelihood by Newton–Raphson (IRLS) on the grouped data; standard errors come
from the inverse Fisher information. Midpoints of exactly 0 or 1 are clipped to [1e-12, 1 − 1e-12] before
the logit (common practice).

References
----------
Van Calster B, Nieboer D, Vergouwe Y, De Cock B, Pencina MJ, Steyerberg EW. A calibration hierarchy for risk
models was defined: from utopia to empirical data. J Clin Epidemiol 2016;74:167-176.
Van Calster B, McLernon DJ, van Smeden M, Wynants L, Steyerberg EW. Calibration: the Achilles heel of
predictive analytics. BMC Med 2019;17:230.
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np

from ..banding import Band, ScoreAxis, bands_at_cuts, merged_bands, released_groups
from ..counts import ANALYSED, NEGATIVE, POSITIVE, Condition, CountSet
from ..data import PreparedChunk
from .base import CellPolicy
from .histogram import ScoreHistogram, band_table

DEFAULT_BIN_EDGES = tuple(round(0.1 * j, 1) for j in range(1, 10))
RISK_CLIP = 1e-12
MAX_ITERATIONS = 100
TOLERANCE = 1e-10
REPORTED_DIGITS = 12  # the fits' figures as released: far more than they mean, and the same on every CPU


def linear_predictor(risk: np.ndarray) -> np.ndarray:
    """logit of the predicted risk, clipped to [1e-12, 1 − 1e-12]."""
    p = np.clip(np.asarray(risk, dtype=np.float64), RISK_CLIP, 1 - RISK_CLIP)
    return np.log(p) - np.log1p(-p)


def _expit(x: np.ndarray) -> np.ndarray:
    return np.exp(-np.logaddexp(0.0, -x))


def fit_logistic(
    design: np.ndarray, events: np.ndarray, trials: np.ndarray, offset: np.ndarray | None = None
) -> tuple[np.ndarray, np.ndarray] | None:
    """Binomial GLM with logit link by Newton–Raphson on grouped data; (coefficients, covariance) or None.

    ``design`` is groups × parameters, ``events`` and ``trials`` per group. Returns None when the fit does
    not exist (no events, no non-events, a singular design) or does not converge.
    """
    total, observed = float(trials.sum()), float(events.sum())
    if observed <= 0 or observed >= total:
        return None
    offset = np.zeros(len(events)) if offset is None else offset

    def loglik(b: np.ndarray) -> float:
        eta = design @ b + offset
        return float(np.sum(events * eta - trials * np.logaddexp(0.0, eta)))

    beta = np.zeros(design.shape[1])
    current = loglik(beta)
    for _ in range(MAX_ITERATIONS):
        mu = _expit(design @ beta + offset)
        gradient = design.T @ (events - trials * mu)
        weight = trials * mu * (1.0 - mu)
        information = design.T @ (design * weight[:, None])
        try:
            step = np.linalg.solve(information, gradient)
        except np.linalg.LinAlgError:
            return None
        # Step halving keeps every Newton step uphill (the log-likelihood is concave).
        for _ in range(30):
            proposal = beta + step
            value = loglik(proposal)
            if np.isfinite(value) and value >= current - 1e-12 * abs(current):
                break
            step = step / 2.0
        beta, current = proposal, value
        if not np.all(np.isfinite(beta)):
            return None
        if np.max(np.abs(step)) < TOLERANCE:
            mu = _expit(design @ beta + offset)
            weight = trials * mu * (1.0 - mu)
            information = design.T @ (design * weight[:, None])
            try:
                covariance = np.linalg.inv(information)
            except np.linalg.LinAlgError:
                return None
            return beta, covariance
    return None


def _significant(value: float, digits: int = REPORTED_DIGITS) -> float:
    """``value`` to ``digits`` significant digits: the last bits of a fit move with the BLAS kernel's summation
    order (the same bins gave a slope SE of 0.15633666371033494 on one CPU and ...497 on another)."""
    return float(f"{value:.{digits}g}") if math.isfinite(value) else value


def bin_midpoint(band: Band) -> float:
    """The middle of a predicted-risk bin, open ends closed at 0 and 1 (risks are probabilities)."""
    low = 0.0 if band.low is None else max(0.0, float(band.low))
    high = 1.0 if band.high is None else min(1.0, float(band.high))
    return (low + high) / 2


class Calibration:
    name = "calibration"

    def __init__(
        self, edges: tuple[float, ...] = DEFAULT_BIN_EDGES, axis: ScoreAxis | None = None, scope: str | None = None
    ) -> None:
        self.edges = tuple(float(e) for e in edges)
        self.axis = axis  # the release's shared score cuts; None = merge these bins alone
        self.scope = scope  # None = the whole site; else the subgroup variable whose level this is
        self.feeds_axis = axis is not None and scope is None and axis.claim_feeder(self)
        self.histogram = ScoreHistogram()
        self.table = np.zeros((len(self.edges) + 1, 2), dtype=np.int64)
        self.bins: list[Band] = []

    def add(self, chunk: PreparedChunk, scores: np.ndarray) -> None:
        self.histogram.add(scores, chunk.outcome)
        self.table += band_table(scores, chunk.outcome, self.edges)
        if self.feeds_axis:
            self.axis.add(chunk, scores)

    def counts(self, policy: CellPolicy) -> CountSet:
        h = self.histogram
        if self.axis is not None:
            self.bins = bands_at_cuts(
                self.edges, self.table, self.axis.cuts(policy.min_cell_size, policy.allow_zero, self.scope)
            )
        else:
            self.bins = merged_bands(self.edges, self.table, policy.min_cell_size, policy.allow_zero)
        out = CountSet()
        for j, band in enumerate(self.bins):
            where = Condition("score", low=band.low, high=band.high)
            events, non_events = f"calibration.bin[{j}].events", f"calibration.bin[{j}].non_events"
            out.add(events, band.counts[0], ANALYSED, POSITIVE, where)
            out.add(non_events, band.counts[1], ANALYSED, NEGATIVE, where)
        out.add("calibration.events", h.n_positive, ANALYSED, POSITIVE)
        out.add("calibration.non_events", h.n_negative, ANALYSED, NEGATIVE)
        out.relate("calibration.events", *(f"calibration.bin[{j}].events" for j in range(len(self.bins))))
        out.relate("calibration.non_events", *(f"calibration.bin[{j}].non_events" for j in range(len(self.bins))))
        # Every statistic from the released bin counts only: each bin's records at the bin's midpoint risk (a run
        # of bins with withheld counts is one bin). A sum of record-level risks would be a further fact about
        # the records (a crafted model could make it count them).
        for j, band in enumerate(self.bins):
            names = frozenset({f"calibration.bin[{j}].events", f"calibration.bin[{j}].non_events"})
            out.derived[f"calibration.bin[{j}].expected"] = (float(sum(band.counts)) * bin_midpoint(band), names)
        totals = frozenset({"calibration.events", "calibration.non_events"})
        for key in ("expected", "observed_expected_ratio", "calibration_intercept", "calibration_intercept_se"):
            out.derived[f"calibration.{key}"] = (lambda released, k=key: self._grouped(released).get(k), totals)
        for key in ("slope_intercept", "slope_intercept_se", "slope", "slope_se"):
            out.derived[f"calibration.{key}"] = (lambda released, k=key: self._grouped(released).get(k), totals)
        return out

    def _grouped(self, released: dict[str, int | None]) -> dict[str, float]:
        """Expected events, O/E and the two fits from the released bins (each at its midpoint risk)."""
        groups = released_groups(
            self.bins,
            released,
            lambda j: (f"calibration.bin[{j}].events", f"calibration.bin[{j}].non_events"),
            ("calibration.events", "calibration.non_events"),
        )
        if not groups:
            return {}
        middle = np.array([bin_midpoint(Band(g[0], g[1], (g[2], g[3]), 0, 0)) for g in groups])
        events = np.array([g[2] for g in groups], dtype=np.float64)
        trials = np.array([g[2] + g[3] for g in groups], dtype=np.float64)
        out: dict[str, float] = {}
        if trials.sum() <= 0:
            return out
        expected = float(trials @ middle)
        out["expected"] = expected
        if expected > 0:
            out["observed_expected_ratio"] = float(events.sum()) / expected
        keep = trials > 0
        lp, events, trials = linear_predictor(middle[keep]), events[keep], trials[keep]
        intercept = fit_logistic(np.ones((len(lp), 1)), events, trials, offset=lp)
        if intercept is not None:
            out["calibration_intercept"] = float(intercept[0][0])
            out["calibration_intercept_se"] = math.sqrt(intercept[1][0, 0])
        slope = fit_logistic(np.column_stack([np.ones(len(lp)), lp]), events, trials)
        if slope is not None:
            out["slope_intercept"] = float(slope[0][0])
            out["slope_intercept_se"] = math.sqrt(slope[1][0, 0])
            out["slope"] = float(slope[0][1])
            out["slope_se"] = math.sqrt(slope[1][1, 1])
        return {key: _significant(value) for key, value in out.items()}

    def render(self, released: dict[str, int | None], derived: dict[str, Any]) -> dict[str, Any]:
        bins = []
        for j, band in enumerate(self.bins):
            events = released.get(f"calibration.bin[{j}].events")
            non_events = released.get(f"calibration.bin[{j}].non_events")
            bins.append(
                {
                    "low": band.low,
                    "high": band.high,
                    "n": None if events is None or non_events is None else events + non_events,
                    "events": events,
                    "non_events": non_events,
                    "sum_predicted_risk": derived.get(f"calibration.bin[{j}].expected"),
                    "merged_bands": [band.first, band.last],
                }
            )
        names = [f"calibration.bin[{j}].{c}" for j in range(len(self.bins)) for c in ("events", "non_events")]
        names += ["calibration.events", "calibration.non_events"]
        return {
            "edges": list(self.edges),
            "rule": "band = low <= predicted risk < high (null = unbounded); adjacent bands merged until each count "
            "is 0 or >= k",
            "bands": bins,
            "observed": released.get("calibration.events"),
            "non_events": released.get("calibration.non_events"),
            "expected": derived.get("calibration.expected"),
            "observed_expected_ratio": derived.get("calibration.observed_expected_ratio"),
            "calibration_intercept": derived.get("calibration.calibration_intercept"),
            "calibration_intercept_se": derived.get("calibration.calibration_intercept_se"),
            "slope": derived.get("calibration.slope"),
            "slope_se": derived.get("calibration.slope_se"),
            "slope_intercept": derived.get("calibration.slope_intercept"),
            "slope_intercept_se": derived.get("calibration.slope_intercept_se"),
            "method": "from the released band counts, each band's records at its midpoint risk: expected = count x "
            "midpoint; logistic fits on logit(midpoint): offset for CITL, covariate for slope; maximum likelihood, "
            "SE from the inverse information",
            "suppressed": [n.removeprefix("calibration.") for n in names if released.get(n) is None],
        }
