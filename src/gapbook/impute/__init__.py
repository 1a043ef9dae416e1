"""Multiple imputation by chained equations (fully conditional specification), our own engine.

The subpackage in four parts, arrows pointing down:

- :mod:`.plan` - which columns, methods, predictors and cells to impute for a study;
- :mod:`.engine` - m chains run in parallel and their result, :class:`ChainedImputation`;
- :mod:`.preparation` - the design matrix, variables and passive formulas, built once;
- :mod:`.numerics` - posterior draws, Newton fits and predictive mean matching on arrays.
"""
from __future__ import annotations

from .engine import ChainedImputation, impute_chained
from .plan import ImputationPlan, ImputationSettings, plan_imputation
from .preparation import passive_inputs

__all__ = ["ChainedImputation", "impute_chained", "ImputationPlan", "ImputationSettings", "plan_imputation",
           "passive_inputs"]
