"""Names a package exports but imports only when first used (PEP 562).

``import gapbook`` must stay quick (the command line starts with it) and a worker process
that runs imputation chains must not load the analysis models, so ``gapbook``,
``gapbook.impute`` and ``gapbook.followup`` list their public names here with the module
defining each, and import that module on the first look-up.
"""
from __future__ import annotations

import importlib
import sys
from typing import Any, Callable, List, Mapping, Tuple

__all__ = ["lazy_exports"]


def lazy_exports(package: str, module_of: Mapping[str, str]) -> Tuple[Callable[[str], Any], Callable[[], List[str]]]:
    """A package's module-level ``__getattr__`` and ``__dir__`` that import each name's module on first use.

    Parameters
    ----------
    package : str
        The package's ``__name__`` (its ``__init__`` is being executed).
    module_of : mapping of str to str
        Public name -> the module defining it, relative to the package (``"engine"``).

    Returns
    -------
    (__getattr__, __dir__)
        The two functions to assign in the package's namespace. A name, once loaded, is kept
        in the namespace, so later look-ups do not reach ``__getattr__``.
    """
    namespace = sys.modules[package].__dict__

    def __getattr__(name: str) -> Any:
        module = module_of.get(name)
        if module is None:
            raise AttributeError(f"module {package!r} has no attribute {name!r}")
        value = getattr(importlib.import_module(f".{module}", package), name)
        namespace[name] = value
        return value

    def __dir__() -> List[str]:
        return sorted(set(namespace) | set(module_of))

    return __getattr__, __dir__
