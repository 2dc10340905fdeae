"""Design diagnostics computed from BinnedStats: density, heaping, balance, placebo, compliance, power."""
from .density import DensityTest, mccrary_test
from .density_lp import lp_density_test
from .density_discrete import frandsen_test, window_count_test
from .sorting import density_suite
from .balance import BalanceResult, covariate_balance
from .heaping import HeapTest, donut_changes, donut_fit, deheaped, heap_near, heap_tests, heap_values
from .placebo import PlaceboResult, placebo_test
from .compliance import Compliance, compliance_profile
from .power import outcome_power

__all__ = ["DensityTest", "mccrary_test", "lp_density_test", "frandsen_test", "window_count_test",
           "density_suite", "BalanceResult", "covariate_balance", "HeapTest", "donut_changes",
           "deheaped", "donut_fit", "heap_near", "heap_tests", "heap_values", "PlaceboResult",
           "placebo_test", "Compliance", "compliance_profile", "outcome_power"]
