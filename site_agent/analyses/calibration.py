"""Calibration of a probability model: binned observed and expected events, O/E, CITL and slope.

Per predicted-risk bin (cut at the request's edges, merged by :mod:`site_agent.banding` until events and
non-events are each 0 or at least k): the number of events and non-events and the sum of predicted risks
(expected events). Over all analysed records: observed events O, expected events E, and two logistic fits
on the linear predictor lp = logit(predicted risk):

- calibration-in-the-large (CITL): logit P(y=1) = a + offset(lp); a = 0 when mean risk matches;
- calibration slope: logit P(y=1) = a + b·lp; b = 1 when predictions are neither too extreme nor too
  modest.

Both are maximum-likelihood fits by Newton–Raphson (IRLS) over the counts per distinct predicted risk,
which is exactly the fit over individual records; standard errors come from the inverse Fisher
information. Risks of exactly 0 or 1 are clipped to [1e-12, 1 − 1e-12] before the logit (common practice).

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

from ..banding import Band, ScoreAxis, bands_at_cuts, merged_bands
from ..counts import ANALYSED, NEGATIVE, POSITIVE, Condition, CountSet
from ..data import PreparedChunk
from .base import CellPolicy
from .histogram import ScoreHistogram, band_sums, band_table

DEFAULT_BIN_EDGES = tuple(round(0.1 * j, 1) for j in range(1, 10))
RISK_CLIP = 1e-12
MAX_ITERATIONS = 100
TOLERANCE = 1e-10


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
        self.sums = np.zeros(len(self.edges) + 1)
        self.bins: list[Band] = []

    def add(self, chunk: PreparedChunk, scores: np.ndarray) -> None:
        self.histogram.add(scores, chunk.outcome)
        self.table += band_table(scores, chunk.outcome, self.edges)
        self.sums += band_sums(scores, self.edges)
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
            expected = float(self.sums[band.first : band.last + 1].sum())
            out.derived[f"calibration.bin[{j}].expected"] = (expected, frozenset({events, non_events}))
        out.add("calibration.events", h.n_positive, ANALYSED, POSITIVE)
        out.add("calibration.non_events", h.n_negative, ANALYSED, NEGATIVE)
        out.relate("calibration.events", *(f"calibration.bin[{j}].events" for j in range(len(self.bins))))
        out.relate("calibration.non_events", *(f"calibration.bin[{j}].non_events" for j in range(len(self.bins))))
        totals = frozenset({"calibration.events", "calibration.non_events"})
        expected = float(self.sums.sum())
        if h.n_positive + h.n_negative > 0:
            out.derived["calibration.expected"] = (expected, totals)
            if expected > 0:
                out.derived["calibration.observed_expected_ratio"] = (h.n_positive / expected, totals)
        lp = linear_predictor(h.keys)
        trials = (h.positive + h.negative).astype(np.float64)
        events = h.positive.astype(np.float64)
        citl = fit_logistic(np.ones((len(lp), 1)), events, trials, offset=lp)
        if citl is not None:
            out.derived["calibration.citl"] = (float(citl[0][0]), totals)
            out.derived["calibration.citl_se"] = (math.sqrt(citl[1][0, 0]), totals)
        slope = fit_logistic(np.column_stack([np.ones(len(lp)), lp]), events, trials)
        if slope is not None:
            out.derived["calibration.slope_intercept"] = (float(slope[0][0]), totals)
            out.derived["calibration.slope_intercept_se"] = (math.sqrt(slope[1][0, 0]), totals)
            out.derived["calibration.slope"] = (float(slope[0][1]), totals)
            out.derived["calibration.slope_se"] = (math.sqrt(slope[1][1, 1]), totals)
        return out

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
            "citl": derived.get("calibration.citl"),
            "citl_se": derived.get("calibration.citl_se"),
            "slope": derived.get("calibration.slope"),
            "slope_se": derived.get("calibration.slope_se"),
            "slope_intercept": derived.get("calibration.slope_intercept"),
            "slope_intercept_se": derived.get("calibration.slope_intercept_se"),
            "method": "logistic fits on logit(predicted risk): offset for CITL, covariate for slope; "
            "maximum likelihood, SE from the inverse information",
            "score_resolution": self.histogram.resolution,
            "suppressed": [n.removeprefix("calibration.") for n in names if released.get(n) is None],
        }
