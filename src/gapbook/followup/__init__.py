"""Follow-up studies: one outcome measured at several planned visits, with dropout.

The subpackage sits at the stage level (it imports the data layer, ``models``, ``inference``,
``pool``, ``little`` and ``report``, never ``stage``, ``runner`` or ``cli``), arrows pointing down:

- :mod:`.analysis` - the follow-up stage: the effect at every visit under every strategy;
- :mod:`.report` - the summary page of a follow-up record;
- :mod:`.audit` - attendance, dropout patterns, retention (Kaplan-Meier), stopping reasons;
- :mod:`.estimand` - the ICH E9(R1) estimand block and which analysis targets each strategy;
- :mod:`.comparisons` - completers and last observation carried forward (comparisons only);
- :mod:`.imputation` - imputation under MAR and reference-based rules for repeated measures;
- :mod:`.mixed_model` - the mixed model for repeated measures (unstructured covariance, REML/ML);
- :mod:`.intake` - a follow-up study's long or wide file into the one shape;
- :mod:`.repeated` - repeated measures in that shape (participants x visits, design rows);
- :mod:`.demo` - the follow-up demo trial generator.

The names below are imported when first used, so importing one part (e.g. :mod:`.repeated`)
does not load the others.
"""
from __future__ import annotations

from ..lazy import lazy_exports

__all__ = ["FOLLOWUP_STRATEGIES", "FollowupAnalysis", "analyse_followup", "FollowupAudit", "audit_followup",
           "describe_estimand", "fit_mixed_model", "impute_repeated", "repeated_outcome", "repeated_study"]

_MODULE_OF = {"FOLLOWUP_STRATEGIES": "analysis", "FollowupAnalysis": "analysis", "analyse_followup": "analysis",
              "FollowupAudit": "audit", "audit_followup": "audit", "describe_estimand": "estimand",
              "fit_mixed_model": "mixed_model", "impute_repeated": "imputation",
              "repeated_outcome": "repeated", "repeated_study": "intake"}


__getattr__, __dir__ = lazy_exports(__name__, _MODULE_OF)
