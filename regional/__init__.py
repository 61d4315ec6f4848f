"""regional: daily flows at ungauged basins by transferring calibrated storage-model parameters.

The public names are loaded on first use (PEP 562 module ``__getattr__``), so that importing
the package, e.g. for ``regional --help``, does not load the numeric libraries.
"""

from __future__ import annotations

import importlib
import sys
import types

__version__ = "0.1.0"

__all__ = ["__version__", "calibrate", "metrics", "simulate"]

#: Public name -> (module, attribute or None for the module itself).
_LAZY = {
    "metrics": ("regional.metrics", None),
    "simulate": ("regional.models", "simulate"),
}


def __getattr__(name: str):
    if name not in _LAZY:
        raise AttributeError(f"module 'regional' has no attribute {name!r}")
    module_name, attribute = _LAZY[name]
    module = importlib.import_module(module_name)
    value = module if attribute is None else getattr(module, attribute)
    globals()[name] = value
    return value


def __dir__() -> list[str]:
    return sorted(set(globals()) | set(__all__))


class _Package(types.ModuleType):
    """The package module: ``regional.calibrate`` stays the function, loaded on first use,
    even after the import system binds the submodule of the same name to the package."""

    @property
    def calibrate(self):
        return importlib.import_module("regional.calibrate").calibrate

    @calibrate.setter
    def calibrate(self, module) -> None:
        """Ignore the binding of the submodule: ``sys.modules`` keeps it."""


sys.modules[__name__].__class__ = _Package
