"""ebm_layers: binary layered energy models (RBMs, deep Boltzmann machines, any layered graph
of binary units) as composable ``torch.nn`` modules, on CPU."""

from .couplings import DenseCoupling, LateralCoupling
from .enumeration import ExactStatistics
from .graph import UpdateSchedule
from .inference import MeanField
from .layers import BinaryLayer
from .metrics import exact_log_likelihood
from .model import EnergyModel, dbm, rbm
from .objective import Monitors, TwoPhaseObjective, weight_decay_groups
from .partition import exact_log_partition
from .sampling import DataParticles, PersistentSampler
from .statistics import Statistics
from .train import FitResult, FitState, fit, load_checkpoint, save_checkpoint

__all__ = [
    "BinaryLayer",
    "DataParticles",
    "DenseCoupling",
    "EnergyModel",
    "ExactStatistics",
    "FitResult",
    "FitState",
    "LateralCoupling",
    "MeanField",
    "Monitors",
    "PersistentSampler",
    "Statistics",
    "TwoPhaseObjective",
    "UpdateSchedule",
    "dbm",
    "exact_log_likelihood",
    "exact_log_partition",
    "fit",
    "load_checkpoint",
    "rbm",
    "save_checkpoint",
    "weight_decay_groups",
]
