"""The adversary: gradient reversal, the DANN schedules and the domain discriminator.

A discriminator learns to tell clean from cluttered features; the gradient reversal layer
between the features and the discriminator turns the encoder's update into one that makes
the two domains hard to tell apart. The adaptation weight and the learning rate follow the
schedules of the DANN paper, driven by the share of steps done (not the clock), so a run is
reproducible on any machine.

References
----------
Ganin, Y. & Lempitsky, V. (2015). Unsupervised domain adaptation by backpropagation.
ICML 2015, section 3.2.
Ganin, Y. et al. (2016). Domain-adversarial training of neural networks. JMLR 17,
59:1-35, eq. 16-17 and section 5.2.2.
"""

from __future__ import annotations

import math

import torch
from torch import nn

from ..validation import check_float

# DANN schedules, Ganin et al., JMLR 2016, section 5.2.2.
DANN_GAMMA = 10.0
DANN_LR_ALPHA = 10.0
DANN_LR_BETA = 0.75
# One hidden layer suffices against a pooled feature vector (common practice).
DISCRIMINATOR_HIDDEN = 64


class _ReverseGradient(torch.autograd.Function):
    @staticmethod
    def forward(ctx, x, lambda_):
        ctx.lambda_ = float(lambda_)
        return x.view_as(x)

    @staticmethod
    def backward(ctx, grad_output):
        return -ctx.lambda_ * grad_output, None


def gradient_reversal(x: torch.Tensor, lambda_: float = 1.0) -> torch.Tensor:
    """Identity in the forward pass; multiplies the gradient by ``-lambda_`` backwards.

    Parameters
    ----------
    x : torch.Tensor
        Features on their way to the discriminator.
    lambda_ : float, default=1.0
        Adaptation weight (see :func:`dann_lambda`).

    Returns
    -------
    torch.Tensor
        ``x`` itself, with the reversed gradient attached.

    References
    ----------
    Ganin & Lempitsky, ICML 2015, section 3.2; Ganin et al., JMLR 2016, eq. 16-17.
    """
    return _ReverseGradient.apply(x, lambda_)


class GradientReversal(nn.Module):
    """Module form of :func:`gradient_reversal`; set ``lambda_`` as training progresses.

    Parameters
    ----------
    lambda_ : float, default=1.0
        Adaptation weight.
    """

    def __init__(self, lambda_: float = 1.0):
        super().__init__()
        self.lambda_ = float(lambda_)

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        return gradient_reversal(x, self.lambda_)

    def extra_repr(self) -> str:
        return f"lambda_={self.lambda_}"


def dann_lambda(p: float, gamma: float = DANN_GAMMA) -> float:
    """Adaptation weight ``2 / (1 + exp(-gamma p)) - 1`` at training progress ``p``.

    It starts at 0, so the discriminator's early noise does not disturb the encoder, and
    approaches 1.

    Parameters
    ----------
    p : float
        Share of the training steps done, in [0, 1].
    gamma : float, default=10
        Steepness of the ramp.

    Returns
    -------
    float

    References
    ----------
    Ganin et al., JMLR 2016, section 5.2.2 (gamma = 10).
    """
    p = check_float("p", p, low=0.0, high=1.0)
    return 2.0 / (1.0 + math.exp(-gamma * p)) - 1.0


def dann_learning_rate(p: float, lr0: float = 0.01, alpha: float = DANN_LR_ALPHA,
                       beta: float = DANN_LR_BETA) -> float:
    """Annealed learning rate ``lr0 / (1 + alpha p) ** beta`` at training progress ``p``.

    Parameters
    ----------
    p : float
        Share of the training steps done, in [0, 1].
    lr0 : float, default=0.01
        Initial learning rate (the paper's; the alignment passes its own).
    alpha, beta : float, default=10, 0.75

    Returns
    -------
    float

    References
    ----------
    Ganin et al., JMLR 2016, section 5.2.2.
    """
    p = check_float("p", p, low=0.0, high=1.0)
    return lr0 / (1.0 + alpha * p) ** beta


def seeded_linear(in_features: int, out_features: int, generator: torch.Generator) -> nn.Linear:
    """An ``nn.Linear`` with PyTorch's default initialisation drawn from ``generator``.

    PyTorch's own initialisation draws from the global generator; drawing from a local one
    leaves the caller's random state untouched. The draws are those of
    ``nn.Linear.reset_parameters``: Kaiming-uniform weights with ``a = sqrt(5)``, biases
    uniform in ``+-1 / sqrt(in_features)``.

    Parameters
    ----------
    in_features, out_features : int
    generator : torch.Generator
        A CPU generator; the layer is created on the CPU.

    Returns
    -------
    nn.Linear

    References
    ----------
    PyTorch, ``torch.nn.Linear.reset_parameters``.
    """
    layer = torch.nn.utils.skip_init(nn.Linear, in_features, out_features)
    with torch.no_grad():
        nn.init.kaiming_uniform_(layer.weight, a=math.sqrt(5), generator=generator)
        bound = 1.0 / math.sqrt(in_features) if in_features > 0 else 0.0
        nn.init.uniform_(layer.bias, -bound, bound, generator=generator)
    return layer


def make_discriminator(dim: int, generator: torch.Generator) -> nn.Module:
    """The domain discriminator: ``dim -> DISCRIMINATOR_HIDDEN -> 1`` with a ReLU, logits out.

    Parameters
    ----------
    dim : int
        Feature dimension.
    generator : torch.Generator
        Draws the initial weights (see :func:`seeded_linear`).

    Returns
    -------
    nn.Sequential
        On the CPU; move it to the features' device.
    """
    return nn.Sequential(seeded_linear(dim, DISCRIMINATOR_HIDDEN, generator), nn.ReLU(),
                         seeded_linear(DISCRIMINATOR_HIDDEN, 1, generator))
