"""Lazy re-exports for the stage packages' ``__init__`` modules (PEP 562 module ``__getattr__``).

A stage package names its public functions and classes in ``__all__`` but imports the module that defines
one only when the name is first used, so ``import wetlandflow`` (or one stage) does not load XGBoost,
rasterio, SHAP and matplotlib at once.  Written here rather than taken from ``lazy_loader`` because the
whole mechanism is the dozen lines below and the package needs no stub files.
"""

from __future__ import annotations

import importlib
import sys
from collections.abc import Callable, Mapping, Sequence
from typing import Any


def exports(package: str, table: Mapping[str, Sequence[str]]
            ) -> tuple[list[str], Callable[[str], Any], Callable[[], list[str]]]:
    """``__all__``, ``__getattr__`` and ``__dir__`` for ``package``, from ``{module: [names]}``.

    ``module`` is relative to ``package`` (``"grid"``) or absolute (``"wetlandflow.inputs.grid"``).  A name
    is resolved on first access and then kept in the package's namespace.  No exported name may equal a
    sub-module's name: the import system sets that attribute to the module (``tests/test_layout.py`` checks).

    Examples
    --------
    >>> __all__, __getattr__, __dir__ = exports(__name__, {"grid": ["Grid"]})  # doctest: +SKIP
    """
    where = {name: module for module, names in table.items() for name in names}

    def __getattr__(name: str) -> Any:
        module = where.get(name)
        if module is None:
            raise AttributeError(f"module {package!r} has no attribute {name!r}")
        full = module if module.startswith("wetlandflow") else f"{package}.{module}"
        value = getattr(importlib.import_module(full), name)
        setattr(sys.modules[package], name, value)
        return value

    def __dir__() -> list[str]:
        return sorted(set(vars(sys.modules[package])) | set(where))

    return sorted(where), __getattr__, __dir__
