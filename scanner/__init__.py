"""cutscan: screen administrative tables for regression-discontinuity natural experiments."""
__version__ = "0.1.0"

from .errors import ColumnNotFoundError, InputError, ScanError, SpecError
from .rules import Rule, load_rules
from .scan import ScanResult, scan
from .spec import ScanSpec, load_spec

__all__ = ["scan", "ScanSpec", "ScanResult", "load_rules", "load_spec", "Rule", "ScanError",
           "InputError", "SpecError", "ColumnNotFoundError"]
