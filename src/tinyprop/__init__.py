"""tinyprop: verified, autodiff-free multilayer-perceptron building blocks.

Not certified for safety functions: validating a network and any code
generated from it against the applicable functional-safety standards, local
codes and qualified review is the user's responsibility.
"""

from .activations import Activation, Identity, LeakyReLU, ReLU, Sigmoid, Softplus, Tanh
from .build import build_mlp
from .check import ActivationReport, GradientReport, check_activation, check_gradient
from .layers import Affine, ColumnScaling, Standardize, Unstandardize
from .losses import (
    CrossEntropyOnSigmoid,
    CrossEntropyOnSoftmax,
    HuberError,
    Loss,
    MeanSquaredError,
    SquaredError,
)
from .network import Network, Trace

__version__ = "0.1.0"

__all__ = [
    "Activation",
    "ActivationReport",
    "Affine",
    "ColumnScaling",
    "CrossEntropyOnSigmoid",
    "CrossEntropyOnSoftmax",
    "GradientReport",
    "HuberError",
    "Identity",
    "LeakyReLU",
    "Loss",
    "MeanSquaredError",
    "Network",
    "ReLU",
    "Sigmoid",
    "Softplus",
    "SquaredError",
    "Standardize",
    "Tanh",
    "Trace",
    "Unstandardize",
    "build_mlp",
    "check_activation",
    "check_gradient",
    "__version__",
]
