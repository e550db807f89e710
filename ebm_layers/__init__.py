"""ebm_layers: layered energy models (RBMs, deep Boltzmann machines, any layered graph of binary,
Gaussian or categorical units) as composable ``torch.nn`` modules, on CPU."""

from . import datasets
from .evaluation.diagnostics import (
    ModeOccupancy,
    ModeTracker,
    autocorrelation_time,
    effective_sample_size,
    mixing_during_learning,
    mode_occupancy,
    mode_switching_rate,
    nearest_template,
    potential_scale_reduction,
    sampler_traces,
)
from .evaluation.metrics import (
    Evaluation,
    LogLikelihood,
    SplitMetrics,
    evaluate,
    exact_free_energy,
    exact_log_likelihood,
    free_energy_gap,
    log_likelihood,
    posterior_states,
    pseudo_log_likelihood,
    reconstruction_error,
)
from .evaluation.partition import (
    Estimate,
    ais_log_partition,
    annealing_schedule,
    exact_log_partition,
    reverse_ais_log_likelihood,
)
from .evaluation.prediction import conditional_log_likelihood, predict
from .features import ConcatenatedLayers, FeatureExtractor, feedforward_network
from .model.categorical import CategoricalLayer
from .model.convolution import Conv2dCoupling, share_bias_by_channel
from .model.couplings import Coupling, DenseCoupling, LateralCoupling
from .model.energy_model import EnergyModel, dbm, rbm
from .model.gaussian import GaussianLayer
from .model.graph import UpdateSchedule
from .model.statistics import Statistics
from .model.units import BinaryLayer, UnitLayer
from .phases.contrastive_divergence import ContrastiveDivergence
from .phases.exact import ExactStatistics
from .phases.fast_weights import FastWeightsSampler
from .phases.gibbs import DataParticles, PersistentSampler, sample_given
from .phases.mean_field import MeanField
from .phases.replica_exchange import ReplicaExchangeSampler
from .training.distributed import rank_generator, rank_states, wrap_distributed
from .training.fit import FitResult, FitState, default_optimizer, fit, load_checkpoint, save_checkpoint
from .training.objective import Monitors, Phase, TwoPhaseObjective, weight_decay_groups
from .training.pretraining import pretrain
from .viz import image_grid, save_image_grid, save_training_plot

__all__ = [
    "BinaryLayer",
    "CategoricalLayer",
    "ConcatenatedLayers",
    "ContrastiveDivergence",
    "Conv2dCoupling",
    "Coupling",
    "DataParticles",
    "DenseCoupling",
    "EnergyModel",
    "Estimate",
    "Evaluation",
    "ExactStatistics",
    "FastWeightsSampler",
    "FeatureExtractor",
    "FitResult",
    "FitState",
    "GaussianLayer",
    "LateralCoupling",
    "LogLikelihood",
    "MeanField",
    "ModeOccupancy",
    "ModeTracker",
    "Monitors",
    "PersistentSampler",
    "Phase",
    "ReplicaExchangeSampler",
    "SplitMetrics",
    "Statistics",
    "TwoPhaseObjective",
    "UnitLayer",
    "UpdateSchedule",
    "ais_log_partition",
    "annealing_schedule",
    "autocorrelation_time",
    "conditional_log_likelihood",
    "datasets",
    "dbm",
    "default_optimizer",
    "effective_sample_size",
    "evaluate",
    "exact_free_energy",
    "exact_log_likelihood",
    "exact_log_partition",
    "feedforward_network",
    "fit",
    "free_energy_gap",
    "image_grid",
    "load_checkpoint",
    "log_likelihood",
    "posterior_states",
    "mixing_during_learning",
    "mode_occupancy",
    "mode_switching_rate",
    "nearest_template",
    "potential_scale_reduction",
    "predict",
    "pretrain",
    "pseudo_log_likelihood",
    "rank_generator",
    "rank_states",
    "rbm",
    "reconstruction_error",
    "reverse_ais_log_likelihood",
    "sample_given",
    "sampler_traces",
    "save_checkpoint",
    "save_image_grid",
    "save_training_plot",
    "share_bias_by_channel",
    "weight_decay_groups",
    "wrap_distributed",
]
