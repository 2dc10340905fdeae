"""Design diagnostics computed from BinnedStats: density, balance, heaping."""
from .density import DensityTest, mccrary_test
from .balance import BalanceResult, covariate_balance
from .heaping import HeapTest, heap_near, heap_tests

__all__ = ["DensityTest", "mccrary_test", "BalanceResult", "covariate_balance", "HeapTest", "heap_near", "heap_tests"]
