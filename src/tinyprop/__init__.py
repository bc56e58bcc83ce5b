"""tinyprop: verified, autodiff-free multilayer-perceptron building blocks.

Not certified for safety functions: validating a network and any code
generated from it against the applicable functional-safety standards, local
codes and qualified review is the user's responsibility.
"""

from ._version import __version__
from .activations import Activation, Identity, LeakyReLU, ReLU, Sigmoid, Softplus, Tanh
from .check import ActivationReport, GradientReport, check_activation, check_gradient
from .checkpoint import CheckpointError, TrainingState, load_checkpoint, save_checkpoint
from .ensemble import Ensemble
from .export import FixedPointReport, agreement_bound, export_c, export_c_fixed_point, export_python
from .layers import Affine, ColumnScaling, Standardize, Unstandardize
from .losses import (
    CrossEntropyOnSigmoid,
    CrossEntropyOnSoftmax,
    HuberError,
    Loss,
    MeanSquaredError,
    SquaredError,
)
from .mlp import build_mlp
from .modelfile import ModelFile, ModelFileError, describe, fingerprint, load, load_model_file, save
from .network import Network, Trace
from .optim import SGD, Adam, Optimizer, OptimizerState, RMSProp, optimizer_from_state
from .recipes import TabularRegression, fit_tabular_regression
from .registry import register_activation
from .schedules import CosineSchedule, ExponentialSchedule, LinearWarmUp, Schedule, StepSchedule
from .sensitivity import SensitivityTable, input_sensitivity
from .solve import SolveResult, solve
from .sweep import SweepRecord, SweepResult, TrainingData, sweep
from .train import (
    EpochInfo,
    History,
    TrainingDiverged,
    TrainingResult,
    train,
)
from .uncertainty import (
    ParameterUncertainty,
    PredictionIntervals,
    RankDeficientError,
    parameter_uncertainty,
    uncertainty_report,
)
from .workspace import Workspace

__all__ = [
    "Activation",
    "ActivationReport",
    "Adam",
    "Affine",
    "CheckpointError",
    "ColumnScaling",
    "CosineSchedule",
    "CrossEntropyOnSigmoid",
    "CrossEntropyOnSoftmax",
    "Ensemble",
    "EpochInfo",
    "ExponentialSchedule",
    "FixedPointReport",
    "GradientReport",
    "History",
    "HuberError",
    "Identity",
    "LeakyReLU",
    "LinearWarmUp",
    "Loss",
    "MeanSquaredError",
    "ModelFile",
    "ModelFileError",
    "Network",
    "Optimizer",
    "OptimizerState",
    "ParameterUncertainty",
    "PredictionIntervals",
    "RMSProp",
    "RankDeficientError",
    "ReLU",
    "SGD",
    "Schedule",
    "SensitivityTable",
    "Sigmoid",
    "Softplus",
    "SolveResult",
    "SquaredError",
    "Standardize",
    "StepSchedule",
    "SweepRecord",
    "SweepResult",
    "TabularRegression",
    "Tanh",
    "Trace",
    "TrainingData",
    "TrainingDiverged",
    "TrainingResult",
    "TrainingState",
    "Unstandardize",
    "Workspace",
    "agreement_bound",
    "build_mlp",
    "check_activation",
    "check_gradient",
    "describe",
    "export_c",
    "export_c_fixed_point",
    "export_python",
    "fingerprint",
    "fit_tabular_regression",
    "input_sensitivity",
    "load",
    "load_checkpoint",
    "load_model_file",
    "optimizer_from_state",
    "parameter_uncertainty",
    "register_activation",
    "save",
    "save_checkpoint",
    "solve",
    "sweep",
    "train",
    "uncertainty_report",
    "__version__",
]
