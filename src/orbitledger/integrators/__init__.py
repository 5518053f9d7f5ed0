"""orbitledger's numerical core: pure computation, no database, files or CLI."""

from .base import AdvanceResult, Integrator
from .constants import C_AU_PER_DAY, G, GAUSS_K, YEAR_D
from .correctors import ORDERS as CORRECTOR_ORDERS
from .errors import IntegratorError
from .gauss_radau import GaussRadau
from .kepler import propagate, stumpff
from .leapfrog import Leapfrog
from .stops import StopConditions, StopKind
from .system import System
from .switching import Switching
from .wisdom_holman import WisdomHolman

# The methods, by name: each class joined Integrator.registry when defined.
METHODS = dict(Integrator.registry)

__all__ = [
    "AdvanceResult", "Integrator", "C_AU_PER_DAY", "G", "GAUSS_K", "YEAR_D",
    "CORRECTOR_ORDERS", "IntegratorError", "propagate", "stumpff", "Leapfrog",
    "StopConditions", "StopKind", "System", "WisdomHolman", "GaussRadau", "Switching", "METHODS",
]
