"""Running one pooling method for the report: its result as JSON, or why it could not be estimated.

One rule for every pooled quantity (the main accuracy tables and the further analyses alike): a
:class:`~federation.stats.PoolingError` is written for people (it names the site and the rule, never a count)
and is shown as it is; any other failure inside a fit becomes one fixed sentence, so no internal error text
reaches a person.
"""

from __future__ import annotations

from collections.abc import Callable
from typing import Any

import numpy as np

from federation.stats import PoolingError

COULD_NOT_FIT = "not estimable: the model could not be fitted to these data"


def not_estimated(reason: str) -> dict[str, str]:
    return {"status": "not estimated", "reason": reason}


def attempt(function: Callable[..., Any], *args: Any, **kwargs: Any) -> dict[str, Any]:
    """Run a pooling function; its result as JSON, or why it could not be estimated."""
    try:
        return function(*args, **kwargs).to_dict()
    except PoolingError as error:  # written for people: names the site and the rule, never a count
        return not_estimated(str(error))
    except (ValueError, ArithmeticError, np.linalg.LinAlgError):  # no internal text reaches a person
        return not_estimated(COULD_NOT_FIT)
