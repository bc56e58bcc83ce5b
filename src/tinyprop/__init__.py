"""tinyprop: verified, autodiff-free multilayer-perceptron building blocks.

Not certified for safety functions: validating a network and any code
generated from it against the applicable functional-safety standards, local
codes and qualified review is the user's responsibility.

The names below are the public API, grouped by job (``docs/api.md`` follows the
same groups). Internals that advanced users may still need stay in their
modules: ``tinyprop.network.Trace``, ``tinyprop.workspace.Workspace``,
``tinyprop.layers.ColumnScaling``, ``tinyprop.optim.OptimizerState`` and
``tinyprop.optim.optimizer_from_state``.
"""

from ._version import __version__
from .activations import Activation, ActivationShape, Identity, LeakyReLU, ReLU, Sigmoid, Softplus, Tanh
from .bounds import (
    Certificate,
    GradientBounds,
    OutputBounds,
    UndeclaredActivation,
    certificate,
    gradient_bounds,
    output_bounds,
)
from .check import ActivationReport, GradientReport, check_activation, check_gradient
from .checkpoint import CheckpointError, TrainingState, load_checkpoint, save_checkpoint
from .classify import Classifier
from .classmetrics import ClassificationMetrics, classification_metrics
from .ensemble import Ensemble
from .envelope import Envelope, EnvelopeCheck, EnvelopeError, OutsideEnvelope
from .export import (
    ErrorBoundWarning,
    FixedPointReport,
    agreement_bound,
    envelope_error_bound,
    export_c,
    export_c_fixed_point,
    export_python,
)
from .layers import Affine, Standardize, Unstandardize
from .losses import (
    CrossEntropyOnSigmoid,
    CrossEntropyOnSoftmax,
    HuberError,
    Loss,
    MeanSquaredError,
    SquaredError,
)
from .mlp import build_mlp
from .modelfile import (
    ModelFile,
    ModelFileError,
    describe,
    fingerprint,
    load,
    load_model_file,
    model_from_parts,
    model_parts,
    save,
)
from .network import Network
from .optim import SGD, Adam, Optimizer, RMSProp
from .posterior import PosteriorUncertainty
from .recipes import (
    ClassificationFit,
    RecipeResult,
    TabularRegression,
    fit_tabular_classification,
    fit_tabular_regression,
)
from .registry import register_activation
from .schedules import CosineSchedule, ExponentialSchedule, LinearWarmUp, Schedule, StepSchedule
from .sensitivity import SensitivityTable, input_sensitivity
from .solve import SolveResult, solve
from .stacked import train_stacked
from .sweep import SweepRecord, SweepResult, TrainingData, setting_key, sweep
from .train import EpochInfo, History, TrainingDiverged, TrainingResult, train
from .uncertainty import (
    ParameterUncertainty,
    PredictionIntervals,
    RankDeficientError,
    parameter_labels,
    parameter_uncertainty,
    uncertainty_report,
)

__all__ = [
    # building a network
    "Network", "build_mlp", "Affine", "Standardize", "Unstandardize",
    # activations
    "Activation", "Sigmoid", "Tanh", "ReLU", "LeakyReLU", "Softplus", "Identity", "register_activation",
    "ActivationShape",
    # losses
    "Loss", "SquaredError", "MeanSquaredError", "HuberError", "CrossEntropyOnSigmoid", "CrossEntropyOnSoftmax",
    # training: the loop, optimizers, schedules, checkpoints
    "train", "TrainingResult", "History", "EpochInfo", "TrainingDiverged", "train_stacked",
    "Optimizer", "SGD", "RMSProp", "Adam",
    "Schedule", "StepSchedule", "ExponentialSchedule", "CosineSchedule", "LinearWarmUp",
    "TrainingState", "save_checkpoint", "load_checkpoint", "CheckpointError",
    # least-squares fitting
    "solve", "SolveResult",
    # recipes
    "fit_tabular_regression", "TabularRegression", "RecipeResult",
    # classification
    "Classifier", "fit_tabular_classification", "ClassificationFit", "classification_metrics",
    "ClassificationMetrics",
    # verification
    "check_gradient", "GradientReport", "check_activation", "ActivationReport",
    # model files
    "save", "load", "load_model_file", "ModelFile", "ModelFileError", "fingerprint", "describe",
    "model_parts", "model_from_parts",
    # inference code
    "export_c", "export_python", "export_c_fixed_point", "FixedPointReport", "agreement_bound",
    "envelope_error_bound", "ErrorBoundWarning",
    # guarantees over an input box
    "output_bounds", "OutputBounds", "gradient_bounds", "GradientBounds", "certificate", "Certificate",
    "UndeclaredActivation",
    # the operating envelope
    "Envelope", "EnvelopeCheck", "EnvelopeError", "OutsideEnvelope",
    # how far to trust a fit
    "parameter_uncertainty", "ParameterUncertainty", "PosteriorUncertainty", "PredictionIntervals",
    "RankDeficientError", "parameter_labels",
    "input_sensitivity", "SensitivityTable", "uncertainty_report",
    # many networks
    "sweep", "setting_key", "SweepResult", "SweepRecord", "TrainingData", "Ensemble",
    "__version__",
]
