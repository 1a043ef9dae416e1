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

from ..lazy import lazy_exports

__all__ = ["ChainedImputation", "impute_chained", "ImputationPlan", "ImputationSettings", "plan_imputation",
           "passive_inputs"]

_MODULE_OF = {"ChainedImputation": "engine", "impute_chained": "engine", "ImputationPlan": "plan",
              "ImputationSettings": "plan", "plan_imputation": "plan", "passive_inputs": "preparation"}


__getattr__, __dir__ = lazy_exports(__name__, _MODULE_OF)
