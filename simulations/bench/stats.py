"""Coordinator statistics at 10, 100 and 1,000 sites, against statsmodels on the same data.

Site tables are drawn from a bivariate logit-normal model (sensitivity about 0.8, specificity about 0.85,
between-site SD 0.5 and 0.4, correlation -0.3; 40-400 participants with the condition and 200-2,000
without). Univariate pooling of logit sensitivity (DerSimonian-Laird and REML) is timed against
``statsmodels.stats.meta_analysis.combine_effects`` (DL: ``method_re="chi2"``; REML against its iterated
Paule-Mandel, the closest it has). Bivariate REML (Reitsma) and the exact binomial GLMM have no reference
implementation in Python; their time is reported against the target (bivariate REML at 1,000 sites < 1 s)
and against univariate DL on the same sites. The headline (the same GLMM with profile-likelihood
intervals for the summary point, the between-site SDs and the correlation) is timed at 50 sites as a ratio
to the plain fit of the same tables (target: under 5 s), on complete tables and on a screening consortium
whose sites withhold cells.
"""

from __future__ import annotations

import time
from typing import Any

import numpy as np

from .common import best_of, say


def tables(k: int, seed: int = 5) -> list[Any]:
    from federation.stats import ReleasedTable

    rng = np.random.default_rng(seed + k)
    mean, sd, rho = np.array([1.386, 1.735]), np.array([0.5, 0.4]), -0.3
    cov = np.array([[sd[0] ** 2, rho * sd[0] * sd[1]], [rho * sd[0] * sd[1], sd[1] ** 2]])
    logits = rng.multivariate_normal(mean, cov, size=k)
    sens, spec = 1 / (1 + np.exp(-logits[:, 0])), 1 / (1 + np.exp(-logits[:, 1]))
    pos, neg = rng.integers(40, 401, size=k), rng.integers(200, 2001, size=k)
    tp, tn = rng.binomial(pos, sens), rng.binomial(neg, spec)
    return [
        ReleasedTable(f"site-{i:04d}", int(tp[i]), int(neg[i] - tn[i]), int(pos[i] - tp[i]), int(tn[i]))
        for i in range(k)
    ]


def run(sizes: tuple[int, ...] = (10, 100, 1000), repeats: int = 5) -> list[dict[str, Any]]:
    from statsmodels.stats.meta_analysis import combine_effects

    from federation.stats import glmm_accuracy, random_effects, reitsma

    rows = []
    for k in sizes:
        sites = tables(k)
        tp = np.array([t.tp for t in sites], dtype=float) + 0.5
        fn = np.array([t.fn for t in sites], dtype=float) + 0.5
        y, v = np.log(tp / fn), 1 / tp + 1 / fn
        # Same output as statsmodels (which computes no tau² interval): the like-for-like comparison.
        dl_s, dl = best_of(random_effects, repeats, y, v, "DL", tau2_interval=False)
        reml_s, _ = best_of(random_effects, repeats, y, v, "REML", tau2_interval=False)
        # Our full result adds the Q-profile tau² interval (Viechtbauer 2007), which costs more.
        dl_full_s, _ = best_of(random_effects, repeats, y, v, "DL")
        sm_dl_s, sm = best_of(combine_effects, repeats, y, v, method_re="chi2")
        sm_pm_s, _ = best_of(combine_effects, repeats, y, v, method_re="iterated")
        if abs(dl.estimate - sm.mean_effect_re) > 1e-8:
            raise RuntimeError(f"DL at {k} sites disagrees with statsmodels: {dl.estimate} vs {sm.mean_effect_re}")
        biv_s, _ = best_of(reitsma, max(1, repeats // 2), sites)
        glmm_s, _ = best_of(glmm_accuracy, 1, sites)
        row = {
            "sites": k,
            "dl_s": round(dl_s, 6),
            "statsmodels_dl_s": round(sm_dl_s, 6),
            "reml_s": round(reml_s, 6),
            "statsmodels_pm_s": round(sm_pm_s, 6),
            "bivariate_reml_s": round(biv_s, 4),
            "glmm_s": round(glmm_s, 3),
            "dl_ratio": round(dl_s / sm_dl_s, 2),
            "dl_with_tau2_interval_s": round(dl_full_s, 6),
            "dl_with_tau2_interval_ratio": round(dl_full_s / sm_dl_s, 2),
            "reml_ratio": round(reml_s / sm_pm_s, 2),
            "bivariate_ratio_to_target": round(biv_s / 1.0, 3),
            "bivariate_ratio_to_dl": round(biv_s / dl_s, 1),
            "glmm_ratio_to_dl": round(glmm_s / dl_s, 1),
        }
        rows.append(row)
        say(
            f"stats: {k:>5} sites  DL {row['dl_ratio']:.2f}x statsmodels "
            f"({row['dl_with_tau2_interval_ratio']:.2f}x with the tau² interval), "
            f"REML {row['reml_ratio']:.2f}x statsmodels PM, "
            f"bivariate REML {biv_s:.3f} s ({row['bivariate_ratio_to_target']:.3f} of target), GLMM {glmm_s:.2f} s"
        )
    return rows


def withheld_tables(k: int, seed: int = 5) -> list[Any]:
    """A screening consortium of ``k`` invented sites (prevalence 2-15%, 30-400 participants) released through
    the site's own disclosure rule: most sites withhold cells (the scenario of ``make validate-stats``)."""
    import dataclasses

    from simulations.validate_stats import SCENARIOS, consortium

    screening = next(s for s in SCENARIOS if s.name == "screening")
    return consortium(dataclasses.replace(screening, sites=k), np.random.default_rng(seed + k))


def _timed(function: Any, repeats: int, *args: Any) -> tuple[float, float, Any]:
    """Shortest wall time and shortest CPU time of ``repeats`` calls, and the last value (CPU time tells a slow
    method from a loaded machine)."""
    walls, cpus, value = [], [], None
    for _ in range(repeats):
        wall, cpu = time.perf_counter(), time.process_time()
        value = function(*args)
        walls.append(time.perf_counter() - wall)
        cpus.append(time.process_time() - cpu)
    return min(walls), min(cpus), value


def run_headline(k: int = 50, repeats: int = 2) -> list[dict[str, Any]]:
    """The headline fit with every profile-likelihood interval at ``k`` sites, against the plain GLMM fit of the
    same tables (point estimates and Wald intervals): complete tables, and a screening consortium whose sites
    withhold cells (each withheld cell censored under the rule that withheld it)."""
    from federation.stats import glmm_accuracy
    from federation.stats.headline import headline_accuracy

    rows = []
    for label, sites in (("complete", tables(k)), ("withheld", withheld_tables(k))):
        plain_s, plain_cpu, _ = _timed(glmm_accuracy, repeats, sites)
        headline_s, headline_cpu, fit = _timed(headline_accuracy, repeats, sites)
        if fit.sensitivity is None or fit.specificity is None:
            raise RuntimeError(f"the headline at {k} sites ({label}) was not estimable: {fit.not_estimable}")
        row = {
            "sites": k,
            "tables": label,
            "sites_withholding": sum(not t.is_complete for t in sites),
            "glmm_s": round(plain_s, 3),
            "glmm_cpu_s": round(plain_cpu, 3),
            "headline_s": round(headline_s, 3),
            "headline_cpu_s": round(headline_cpu, 3),
            "ratio_to_plain_fit": round(headline_s / plain_s, 2),
            "ratio_to_target": round(headline_s / 5.0, 3),
        }
        rows.append(row)
        say(
            f"stats: headline with profile intervals at {k} sites ({label}, {row['sites_withholding']} withholding) "
            f"{headline_s:.2f} s, CPU {headline_cpu:.2f} s ({row['ratio_to_plain_fit']:.1f}x the plain fit; "
            f"{row['ratio_to_target']:.2f} of the 5 s target)"
        )
    return rows
