"""cutscan: screen administrative tables for regression-discontinuity natural experiments."""
__version__ = "0.1.0"

import importlib as _importlib
import sys as _sys
import types as _types

from .errors import ColumnNotFoundError, InputError, ScanError, SpecError
from .rules import Rule, load_rules
from .spec import ScanSpec, load_spec

__all__ = ["scan", "ScanSpec", "ScanResult", "load_rules", "load_spec", "Rule", "ScanError",
           "InputError", "SpecError", "ColumnNotFoundError"]

_LAZY = ("scan", "ScanResult")


def __getattr__(name):
    # scan and ScanResult load the estimators (scipy among them) on first use, so commands that
    # only read results (cutscan report, rules list) start in a fraction of a second.
    if name in _LAZY:
        module = _importlib.import_module(".scan", __name__)
        for n in _LAZY:
            _sys.modules[__name__].__dict__[n] = getattr(module, n)
        return getattr(module, name)
    raise AttributeError(f"module 'scanner' has no attribute {name!r}")


class _Package(_types.ModuleType):
    """Keeps ``scanner.scan`` the function when the submodule of the same name is imported
    (the import system would otherwise bind the submodule there; it stays reachable as
    ``sys.modules['scanner.scan']``)."""

    def __setattr__(self, name, value):
        if name in _LAZY and isinstance(value, _types.ModuleType):
            return
        super().__setattr__(name, value)


_sys.modules[__name__].__class__ = _Package
