"""A summary ROC (SROC) curve is never drawn as a pooled ROC curve.

The demo study asks only for the 2×2 table, so no site releases score bands and there is no ROC curve to
draw; the analysis still holds SROC curves of the bivariate model (``pooled.bivariate.sroc``, with
``false_positive_rate`` and ``sensitivity`` arrays), which a search for keys containing "roc" used to pick up.
"""

from __future__ import annotations

from federation.report.figures import POOLED_ROC_PATHS, roc_figure
from federation.report.inputs import gather
from federation.report.readers import get_path
from federation.store import Store

from .studies import demo_store


def test_sroc_is_not_drawn_as_pooled_roc(tmp_path):
    store = Store(demo_store(tmp_path / "demo"))
    try:
        inputs = gather(store)
    finally:
        store.close()
    sroc = get_path(inputs.analysis, ("pooled", "bivariate", "sroc"))
    assert len(sroc["false_positive_rate"]) == len(sroc["sensitivity"]) >= 2  # an SROC curve is there to be misread
    assert all(get_path(inputs.analysis, path) is None for path in POOLED_ROC_PATHS)
    assert roc_figure(inputs) == ""
