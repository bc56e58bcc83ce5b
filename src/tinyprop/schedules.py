"""Learning-rate schedules: a multiplier ``eta_t`` of the base learning rate.

An optimizer built with ``lr=alpha`` and ``schedule=s`` uses the learning rate
``alpha * s.multiplier(t)`` for its update number ``t + 1``, where ``t`` counts
the updates already made (``t = 0`` for the first). Counting is in updates
(mini-batches), not epochs: with ``n`` training samples and batch size ``B``
an epoch is ``ceil(n / B)`` updates.

The multiplier is the ``eta_t`` of Loshchilov & Hutter (2019), "Decoupled
Weight Decay Regularization", ICLR, which also scales decoupled weight decay
(see :class:`tinyprop.optim.Adam`).

- :class:`StepSchedule`: ``eta_t = factor ** floor(t / every)``
- :class:`ExponentialSchedule`: ``eta_t = factor ** (t / every)``
- :class:`CosineSchedule`: ``eta_t = floor + (1 - floor) (1 + cos(pi min(t, steps) / steps)) / 2``
- :class:`LinearWarmUp`: ``eta_t = (t + 1) / steps`` for ``t < steps``, then another schedule

A schedule holds no state: the multiplier is a pure function of ``t``, so
checkpointing the optimizer's update count is enough to resume it.
"""

from __future__ import annotations

import math
from typing import Any

from ._validate import positive_int, real_in_range

__all__ = ["Schedule", "StepSchedule", "ExponentialSchedule", "CosineSchedule", "LinearWarmUp"]


class Schedule:
    """Base class: ``multiplier(t) -> float`` for ``t = 0, 1, 2, ...`` updates already made."""

    def multiplier(self, t: int) -> float:
        raise NotImplementedError

    def settings(self) -> dict[str, Any]:
        """JSON-able description, ``{"kind": class name, **constructor arguments}``."""
        raise NotImplementedError

    def __eq__(self, other: object) -> bool:
        return isinstance(other, Schedule) and self.settings() == other.settings()

    def __hash__(self) -> int:
        return hash(repr(self))

    def __repr__(self) -> str:
        settings = self.settings()
        kind = settings.pop("kind")
        return f"{kind}({', '.join(f'{k}={v!r}' for k, v in settings.items())})"


class StepSchedule(Schedule):
    """Piecewise constant decay: ``eta_t = factor ** floor(t / every)``.

    The learning rate is multiplied by ``factor`` after every ``every`` updates.

    >>> s = StepSchedule(every=2, factor=0.5)
    >>> [s.multiplier(t) for t in range(5)]
    [1.0, 1.0, 0.5, 0.5, 0.25]
    """

    def __init__(self, every: int, factor: float = 0.5) -> None:
        self.every = positive_int(every, "every")
        self.factor = real_in_range(factor, "factor", low=0.0, high=1.0, low_open=True)

    def multiplier(self, t: int) -> float:
        return self.factor ** (t // self.every)

    def settings(self) -> dict[str, Any]:
        return {"kind": "StepSchedule", "every": self.every, "factor": self.factor}


class ExponentialSchedule(Schedule):
    """Smooth exponential decay: ``eta_t = factor ** (t / every)``.

    The learning rate shrinks by ``factor`` over each span of ``every`` updates.

    >>> ExponentialSchedule(factor=0.1, every=100).multiplier(200)
    0.010000000000000002
    """

    def __init__(self, factor: float, every: int = 1) -> None:
        self.factor = real_in_range(factor, "factor", low=0.0, high=1.0, low_open=True)
        self.every = positive_int(every, "every")

    def multiplier(self, t: int) -> float:
        return self.factor ** (t / self.every)

    def settings(self) -> dict[str, Any]:
        return {"kind": "ExponentialSchedule", "factor": self.factor, "every": self.every}


class CosineSchedule(Schedule):
    """Half a cosine from 1 down to ``floor`` over ``steps`` updates, then ``floor``.

    ``eta_t = floor + (1 - floor) * (1 + cos(pi * min(t, steps) / steps)) / 2``

    Loshchilov & Hutter (2017), "SGDR: Stochastic Gradient Descent with Warm
    Restarts", ICLR, eq. (5), one cycle without restarts.

    >>> s = CosineSchedule(steps=4)
    >>> [round(s.multiplier(t), 4) for t in range(6)]
    [1.0, 0.8536, 0.5, 0.1464, 0.0, 0.0]
    """

    def __init__(self, steps: int, floor: float = 0.0) -> None:
        self.steps = positive_int(steps, "steps")
        self.floor = real_in_range(floor, "floor", low=0.0, high=1.0)

    def multiplier(self, t: int) -> float:
        fraction = min(t, self.steps) / self.steps
        return self.floor + (1.0 - self.floor) * 0.5 * (1.0 + math.cos(math.pi * fraction))

    def settings(self) -> dict[str, Any]:
        return {"kind": "CosineSchedule", "steps": self.steps, "floor": self.floor}


class LinearWarmUp(Schedule):
    """Linear warm-up over ``steps`` updates, then ``then`` (or a constant 1).

    ``eta_t = (t + 1) / steps`` for ``t < steps``; afterwards
    ``eta_t = then.multiplier(t - steps)``, so the following schedule starts
    from its own beginning when the warm-up ends.

    Goyal et al. (2017), "Accurate, Large Minibatch SGD: Training ImageNet in
    1 Hour", arXiv:1706.02677, section 2.2 (gradual warm-up).

    >>> s = LinearWarmUp(steps=4, then=StepSchedule(every=2, factor=0.5))
    >>> [s.multiplier(t) for t in range(8)]
    [0.25, 0.5, 0.75, 1.0, 1.0, 1.0, 0.5, 0.5]
    """

    def __init__(self, steps: int, then: Schedule | None = None) -> None:
        self.steps = positive_int(steps, "steps")
        if then is not None and not isinstance(then, Schedule):
            raise TypeError(f"then must be a Schedule or None, got {type(then).__name__}")
        self.then = then

    def multiplier(self, t: int) -> float:
        if t < self.steps:
            return (t + 1) / self.steps
        return 1.0 if self.then is None else self.then.multiplier(t - self.steps)

    def settings(self) -> dict[str, Any]:
        then = None if self.then is None else self.then.settings()
        return {"kind": "LinearWarmUp", "steps": self.steps, "then": then}
