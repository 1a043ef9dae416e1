"""Multiple imputation by chained equations (fully conditional specification), our own engine.

The subpackage in five parts, arrows pointing down:

- :mod:`.plan` - which columns, methods, predictors and cells to impute for a study;
- :mod:`.engine` - m chains run in parallel and their result, :class:`ChainedImputation`;
- :mod:`.chains` - one chain: its state, its visits, :func:`~.chains.run_chain`;
- :mod:`.preparation` - the variables, their values and codes and passive formulas, built once;
- :mod:`.numerics` - posterior draws, Newton fits and predictive mean matching on arrays.

The names below are imported when first used: a worker process that runs chains imports
only :mod:`.chains` and what it needs (numpy, scipy), not the analysis models the result
uses, which keeps every worker about 100 MB smaller.
"""
from __future__ import annotations

import importlib
from typing import Any, List

__all__ = ["ChainedImputation", "impute_chained", "ImputationPlan", "ImputationSettings", "plan_imputation",
           "passive_inputs"]

_MODULE_OF = {"ChainedImputation": ".engine", "impute_chained": ".engine", "ImputationPlan": ".plan",
              "ImputationSettings": ".plan", "plan_imputation": ".plan", "passive_inputs": ".preparation"}


def __getattr__(name: str) -> Any:
    if name in _MODULE_OF:
        value = getattr(importlib.import_module(_MODULE_OF[name], __name__), name)
        globals()[name] = value
        return value
    raise AttributeError(f"module {__name__!r} has no attribute {name!r}")


def __dir__() -> List[str]:
    return sorted(set(globals()) | set(__all__))
