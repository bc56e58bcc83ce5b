"""First-order optimizers that update parameter arrays in place.

Every optimizer has one public step, ``opt.update(params, grads)``: ``params``
is a list of parameter arrays (for a network, ``net.params``), ``grads`` the
gradients aligned with it (``net.backward(...)[0]``). The parameter arrays are
modified in place; ``grads`` is never modified.

Common notation in the update formulas: ``g`` is the gradient, ``t`` the
number of the update (1 for the first), ``alpha`` the base learning rate
``lr`` and ``eta_t`` the multiplier of the optional schedule (see
:mod:`tinyprop.schedules`; 1 without one), so the learning rate of update
``t`` is ``alpha * eta_{t-1}``.

Gradient-norm clipping (``clip_norm=c``): when the global norm
``||g|| = sqrt(sum over all arrays of sum g**2)`` exceeds ``c``, every rule
below uses ``g * c / ||g||`` instead of ``g`` (Pascanu, Mikolov & Bengio (2013),
"On the difficulty of training recurrent neural networks", ICML, Algorithm 1).

Memory: the state arrays (velocities, moment estimates) and one work buffer
per parameter array are allocated on the first update, with the parameters'
dtype; later updates write into them with ``out=`` arguments and allocate no
arrays. The state is exported and restored with :meth:`Optimizer.get_state`
and :meth:`Optimizer.set_state` as plain arrays and JSON-able scalars (for
checkpoints).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any, Sequence

import numpy as np

from ._json import canonical_json
from ._validate import real_in_range
from ._views import flat_vector, views_of
from .schedules import CosineSchedule, ExponentialSchedule, LinearWarmUp, Schedule, StepSchedule

__all__ = ["Optimizer", "OptimizerState", "SGD", "RMSProp", "Adam", "optimizer_from_state"]


@dataclass
class OptimizerState:
    """Everything an optimizer needs to continue exactly where it stopped.

    ``kind`` is the class name, ``settings`` the JSON-able constructor
    arguments (:meth:`Optimizer.settings`), ``steps`` the number of updates
    made, and ``arrays`` the state arrays named ``"<slot>/<i>"`` for the
    parameter array ``i`` (for example ``"first_moment/0"``); it is empty
    before the first update.
    """

    kind: str
    settings: dict[str, Any]
    steps: int
    arrays: dict[str, np.ndarray] = field(default_factory=dict)


class Optimizer:
    """Base class. Subclasses name their state slots and implement ``_apply``.

    Parameters shared by all optimizers: ``lr`` (the base learning rate
    ``alpha > 0``), ``schedule`` (a :class:`~tinyprop.schedules.Schedule` or
    ``None`` for a constant rate) and ``clip_norm`` (``None`` or the largest
    allowed global gradient norm ``c > 0``).
    """

    _slot_names: tuple[str, ...] = ()

    def __init__(self, lr: float, *, schedule: Schedule | None = None, clip_norm: float | None = None) -> None:
        self.lr = real_in_range(lr, "lr", low=0.0, low_open=True)
        if schedule is not None and not isinstance(schedule, Schedule):
            raise TypeError(
                f"schedule must be a tinyprop Schedule (e.g. CosineSchedule(steps=1000)) or None, "
                f"got {type(schedule).__name__}"
            )
        self.schedule = schedule
        self.clip_norm = None if clip_norm is None else real_in_range(clip_norm, "clip_norm", low=0.0, low_open=True)
        self.steps = 0
        self._layout: list[tuple[tuple[int, ...], np.dtype]] | None = None
        self._slots: dict[str, list[np.ndarray]] = {}
        self._work: list[np.ndarray] = []
        self._flat_slots: dict[str, list[np.ndarray]] = {}
        self._flat_work: list[np.ndarray] = []
        self._clipped: list[np.ndarray] = []

    # ----------------------------------------------------------------- the step
    def update(self, params: Sequence[np.ndarray], grads: Sequence[np.ndarray]) -> None:
        """Apply one update to ``params`` in place, using ``grads`` (not modified).

        When ``params`` is ``net.params`` and ``grads`` comes from
        ``net.backward`` (lists of views of one flat vector each) and there is
        no clipping, every array is updated at once through the flat vectors:
        the same operations element for element, a few calls instead of a few
        per array.
        """
        if self._layout is None:
            self._allocate(params)
        flat = None if self.clip_norm is not None else self._flat_pair(params, grads)
        if flat is None:
            self._check(params, grads)
        multiplier = 1.0 if self.schedule is None else self.schedule.multiplier(self.steps)
        if flat is not None:
            self.steps += 1
            self._apply(self._flat_slots, self._flat_work, 0, flat[0], flat[1], multiplier)
            return
        grads = self._clip(grads)
        self.steps += 1
        slots, work = self._slots, self._work
        for i, (p, g) in enumerate(zip(params, grads)):
            self._apply(slots, work, i, p, g, multiplier)

    def _flat_pair(
        self, params: Sequence[np.ndarray], grads: Sequence[np.ndarray]
    ) -> tuple[np.ndarray, np.ndarray] | None:
        """The flat vectors behind ``params`` and ``grads`` when both fit this optimizer's layout, else ``None``."""
        P, G = flat_vector(params), flat_vector(grads)
        if P is None or G is None or not self._flat_work:
            return None
        p_shapes, g_shapes, known = params.shapes, grads.shapes, self._same_shapes  # type: ignore[attr-defined]
        same = (p_shapes is known or self._has_layout(p_shapes)) and (g_shapes is known or self._has_layout(g_shapes))
        if not same or P.dtype != self._flat_work[0].dtype:
            return None  # not the layout of the first update: the per-array check explains
        return P, G

    def _has_layout(self, shapes: tuple[tuple[int, ...], ...]) -> bool:
        """``shapes == self._shapes``; the last equal tuple met is remembered, so that it is recognised by identity.

        (Tuples do not change: one that was equal when remembered is equal now.)
        """
        if shapes != self._shapes:
            return False
        self._same_shapes = shapes
        return True

    def _apply(
        self, slots: dict[str, list[np.ndarray]], scratch: list[np.ndarray], i: int, p: np.ndarray, g: np.ndarray,
        multiplier: float,
    ) -> None:
        """Update ``p`` from ``g`` in place, with state ``slots[name][i]`` and scratch array ``scratch[i]``.

        ``slots`` and ``scratch`` are the per-array lists, or, for an update of all
        arrays at once, the one-element lists of the flat vectors (``i == 0``).
        """
        raise NotImplementedError

    def _clip(self, grads: Sequence[np.ndarray]) -> Sequence[np.ndarray]:
        if self.clip_norm is None:
            return grads
        norm = math.sqrt(sum(float(np.vdot(g, g)) for g in grads))
        if norm <= self.clip_norm or not math.isfinite(norm):  # non-finite: the caller's guard decides
            return grads
        scale = self.clip_norm / norm
        for g, out in zip(grads, self._clipped):
            np.multiply(g, scale, out=out)
        return self._clipped

    def _allocate(self, params: Sequence[np.ndarray]) -> None:
        arrays = [np.asarray(p) for p in params]
        for i, p in enumerate(arrays):
            if p.dtype.kind != "f":
                raise TypeError(f"params[{i}] must be a float array, got dtype {p.dtype}")
        self._layout = [(p.shape, p.dtype) for p in arrays]
        self._slots = {name: self._new_arrays(np.zeros) for name in self._slot_names}
        self._allocate_buffers()

    def _new_arrays(self, make: Any) -> list[np.ndarray]:
        """Arrays of the layout from ``make(size, dtype)``: views of one flat array when the dtypes agree."""
        assert self._layout is not None
        shapes = tuple(shape for shape, _ in self._layout)
        dtypes = {dtype for _, dtype in self._layout}
        if len(dtypes) == 1:
            return views_of(make(sum(math.prod(shape) for shape in shapes), dtypes.pop()), shapes)
        return [make(shape, dtype) for shape, dtype in self._layout]

    def _allocate_buffers(self) -> None:
        """Scratch arrays; each slot and the scratch as views of one flat array too, for flat updates.

        Slot arrays that are not yet views of one flat array (state set from
        outside) are copied into one.
        """
        assert self._layout is not None
        self._work = self._new_arrays(np.empty)
        self._clipped = self._new_arrays(np.empty) if self.clip_norm else []
        self._flat_slots: dict[str, list[np.ndarray]] = {}
        self._flat_work: list[np.ndarray] = []
        self._shapes = tuple(shape for shape, _ in self._layout)
        self._same_shapes = self._shapes
        flat_work = flat_vector(self._work)
        if flat_work is None:
            return  # arrays of several dtypes are updated one by one
        for name, slot in self._slots.items():
            flat = flat_vector(slot)
            if flat is None:
                flat = np.concatenate([a.reshape(-1) for a in slot])
                self._slots[name] = views_of(flat, self._shapes)
            self._flat_slots[name] = [flat]
        self._flat_work = [flat_work]

    def _check(self, params: Sequence[np.ndarray], grads: Sequence[np.ndarray]) -> None:
        layout = self._layout
        assert layout is not None
        if len(params) != len(layout) or len(grads) != len(layout):
            raise ValueError(
                f"this optimizer holds state for {len(layout)} parameter arrays; "
                f"got {len(params)} params and {len(grads)} grads"
            )
        for i, ((shape, dtype), p, g) in enumerate(zip(layout, params, grads)):
            if p.shape != shape or p.dtype != dtype or g.shape != shape:
                raise ValueError(
                    f"params[{i}] / grads[{i}] must have shape {shape} and dtype {dtype} "
                    f"(fixed at the first update), got {p.shape} {p.dtype} / {g.shape}; "
                    "use a new optimizer for a different network"
                )

    # ----------------------------------------------------------------- state
    def _mark(self) -> None:
        """Remember the current state (update count and state arrays) for :meth:`_rewind`.

        The copies go into buffers kept for the purpose, so marking before
        every epoch allocates nothing after the first time.
        """
        if self._layout is None:
            self._marked: tuple[int, dict[str, list[np.ndarray]] | None] = (self.steps, None)
            return
        previous = getattr(self, "_marked", (0, None))[1]
        if previous is None or any(len(previous[k]) != len(v) for k, v in self._slots.items()):
            previous = {name: [a.copy() for a in slot] for name, slot in self._slots.items()}
        else:
            for name, slot in self._slots.items():
                for copy, array in zip(previous[name], slot):
                    np.copyto(copy, array)
        self._marked = (self.steps, previous)

    def _rewind(self) -> None:
        """Return to the state of the last :meth:`_mark`."""
        steps, arrays = self._marked
        self.steps = steps
        if arrays is None:
            self._layout, self._slots, self._work, self._clipped = None, {}, [], []
            return
        for name, slot in self._slots.items():
            for array, copy in zip(slot, arrays[name]):
                np.copyto(array, copy)

    def _take_state(
        self, steps: int, layout: list[tuple[tuple[int, ...], np.dtype]] | None, slots: dict[str, list[np.ndarray]]
    ) -> None:
        """Adopt ``steps``, the parameter ``layout`` and the state arrays ``slots`` as they are.

        Unchecked (the arrays may be non-finite): for :func:`tinyprop.train_stacked`,
        which hands every optimizer the state its network reached in the stack.
        """
        self.steps = int(steps)
        self._layout, self._slots = layout, slots
        if layout is None:
            self._work, self._clipped = [], []
        else:
            self._allocate_buffers()

    def settings(self) -> dict[str, Any]:
        """JSON-able constructor arguments (the schedule as its own settings dict)."""
        return {
            "lr": self.lr,
            **self._own_settings(),
            "schedule": None if self.schedule is None else self.schedule.settings(),
            "clip_norm": self.clip_norm,
        }

    def _own_settings(self) -> dict[str, Any]:
        raise NotImplementedError

    def get_state(self) -> OptimizerState:
        """A copy of the optimizer's state: update count and state arrays."""
        arrays = {
            f"{name}/{i}": array.copy() for name, slot in self._slots.items() for i, array in enumerate(slot)
        }
        return OptimizerState(type(self).__name__, self.settings(), self.steps, arrays)

    def set_state(self, state: OptimizerState, *, params: Sequence[np.ndarray] | None = None) -> None:
        """Continue from ``state`` (from :meth:`get_state` of an optimizer with equal settings).

        The arrays are copied. Raises ``ValueError`` if the kind or settings
        differ, the arrays do not form complete, consistent slots, or (with
        ``params``, the parameter arrays the next updates will receive) their
        shapes and dtypes differ from ``params``. Everything is checked before
        anything changes: a refused state leaves the optimizer as it was.
        """
        if not isinstance(state, OptimizerState):
            raise TypeError(f"state must be an OptimizerState, got {type(state).__name__}")
        if state.kind != type(self).__name__:
            raise ValueError(f"state is for a {state.kind} optimizer, this one is a {type(self).__name__}")
        if canonical_json(state.settings) != canonical_json(self.settings()):
            raise ValueError(
                f"state was saved with settings {state.settings}, this optimizer has {self.settings()}; "
                "build the optimizer with the same settings to resume"
            )
        if isinstance(state.steps, bool) or not isinstance(state.steps, (int, np.integer)) or state.steps < 0:
            raise ValueError(f"state.steps must be an integer >= 0, got {state.steps!r}")
        slots = _slots_from_arrays(state.arrays, self._slot_names)
        if slots is None and self._slot_names and state.steps > 0:
            raise ValueError(
                f"state has made {state.steps} updates but holds no {', '.join(self._slot_names)} arrays; "
                "a state after an update keeps them"
            )
        if slots is not None and params is not None:
            _check_layout(slots[self._slot_names[0]], params)
        self.steps = int(state.steps)
        if slots is None:
            self._layout, self._slots, self._work, self._clipped = None, {}, [], []
            return
        first = slots[self._slot_names[0]]
        self._layout = [(a.shape, a.dtype) for a in first]
        self._slots = slots
        self._allocate_buffers()

    def __repr__(self) -> str:
        return f"{type(self).__name__}({', '.join(f'{k}={v!r}' for k, v in self.settings().items())})"


def _check_layout(arrays: list[np.ndarray], params: Sequence[np.ndarray]) -> None:
    """Refuse state arrays that do not match the parameter arrays in count, shape and dtype."""
    if len(arrays) != len(params):
        raise ValueError(f"state holds arrays for {len(arrays)} parameter arrays, the parameters are {len(params)}")
    for i, (a, p) in enumerate(zip(arrays, params)):
        if a.shape != np.shape(p) or a.dtype != np.asarray(p).dtype:
            raise ValueError(
                f"state array {i} has shape {a.shape} {a.dtype}, the parameter array it updates has "
                f"{np.shape(p)} {np.asarray(p).dtype}"
            )


def _slots_from_arrays(
    arrays: dict[str, np.ndarray], slot_names: tuple[str, ...]
) -> dict[str, list[np.ndarray]] | None:
    """Group ``"<slot>/<i>"`` arrays into slots; ``None`` for the empty (fresh) state."""
    if not isinstance(arrays, dict):
        raise TypeError(f"state.arrays must be a dict of arrays, got {type(arrays).__name__}")
    if not arrays or not slot_names:
        if arrays:
            raise ValueError(f"this optimizer keeps no state arrays, got {sorted(arrays)}")
        return None
    count = len(arrays) // len(slot_names)
    expected = {f"{name}/{i}" for name in slot_names for i in range(count)}
    if set(arrays) != expected:
        raise ValueError(
            f"state.arrays must be named '<slot>/<i>' with slots {list(slot_names)} and i = 0..k-1, "
            f"got {sorted(arrays)}"
        )
    slots: dict[str, list[np.ndarray]] = {}
    for name in slot_names:
        slots[name] = []
        for i in range(count):
            array = np.array(arrays[f"{name}/{i}"], copy=True)
            if array.dtype.kind != "f" or not np.all(np.isfinite(array)):
                raise ValueError(f"state array {name}/{i} must be finite floats, got dtype {array.dtype}")
            reference = array if name == slot_names[0] else slots[slot_names[0]][i]
            if array.shape != reference.shape or array.dtype != reference.dtype:
                raise ValueError(
                    f"state array {name}/{i} has shape {array.shape} {array.dtype}, "
                    f"expected {reference.shape} {reference.dtype} like {slot_names[0]}/{i}"
                )
            slots[name].append(array)
    return slots


_SCHEDULES: dict[str, type[Schedule]] = {
    cls.__name__: cls for cls in (StepSchedule, ExponentialSchedule, CosineSchedule, LinearWarmUp)
}


def _schedule_from_settings(settings: dict[str, Any] | None) -> Schedule | None:
    """Rebuild a schedule from :meth:`Schedule.settings` output (``None`` stays ``None``)."""
    if settings is None:
        return None
    if not isinstance(settings, dict) or settings.get("kind") not in _SCHEDULES:
        raise ValueError(f"schedule settings must be a dict with kind in {sorted(_SCHEDULES)}, got {settings!r}")
    arguments = {k: v for k, v in settings.items() if k != "kind"}
    if settings["kind"] == "LinearWarmUp":
        arguments["then"] = _schedule_from_settings(arguments.get("then"))
    return _SCHEDULES[settings["kind"]](**arguments)


class SGD(Optimizer):
    """Stochastic gradient descent, optionally with classical or Nesterov momentum.

    With learning rate ``lr_t = alpha * eta_{t-1}`` and momentum ``mu``:

    - plain (``momentum=0``):   ``theta <- theta - lr_t g`` (Robbins & Monro (1951),
      "A Stochastic Approximation Method", Ann. Math. Statist. 22(3))
    - classical momentum (Polyak (1964), "Some methods of speeding up the
      convergence of iteration methods", USSR Comput. Math. & Math. Phys. 4(5)):
      ``v <- mu v - lr_t g``;  ``theta <- theta + v``
    - Nesterov momentum, in the form that evaluates the gradient at the current
      parameters (Sutskever, Martens, Dahl & Hinton (2013), "On the importance
      of initialization and momentum in deep learning", ICML, eq. (3)-(4);
      Bengio, Boulanger-Lewandowski & Pascanu (2013), "Advances in optimizing
      recurrent networks", ICASSP, eq. (7)):
      ``v <- mu v - lr_t g``;  ``theta <- theta + mu v - lr_t g``

    ``v`` starts at zero.

    >>> import numpy as np
    >>> theta = np.array([1.0, -2.0])
    >>> SGD(0.1).update([theta], [np.array([1.0, 1.0])])
    >>> theta
    array([ 0.9, -2.1])
    """

    def __init__(
        self,
        lr: float,
        momentum: float = 0.0,
        nesterov: bool = False,
        *,
        schedule: Schedule | None = None,
        clip_norm: float | None = None,
    ) -> None:
        super().__init__(lr, schedule=schedule, clip_norm=clip_norm)
        self.momentum = real_in_range(momentum, "momentum", low=0.0, high=1.0, high_open=True)
        if not isinstance(nesterov, bool):
            raise TypeError(f"nesterov must be True or False, got {nesterov!r}")
        if nesterov and self.momentum == 0.0:
            raise ValueError("nesterov=True needs a momentum > 0 (with momentum 0 it is plain SGD)")
        self.nesterov = nesterov
        self._slot_names = ("velocity",) if self.momentum > 0.0 else ()

    def _own_settings(self) -> dict[str, Any]:
        return {"momentum": self.momentum, "nesterov": self.nesterov}

    def _apply(
        self, slots: dict[str, list[np.ndarray]], scratch: list[np.ndarray], i: int, p: np.ndarray, g: np.ndarray,
        multiplier: float,
    ) -> None:
        step = scratch[i]
        np.multiply(g, self.lr * multiplier, out=step)  # lr_t g
        if self.momentum == 0.0:
            p -= step
            return
        v = slots["velocity"][i]
        v *= self.momentum
        v -= step
        if self.nesterov:
            p -= step
            np.multiply(v, self.momentum, out=step)
            p += step
        else:
            p += v


class RMSProp(Optimizer):
    """Gradient scaled by a running root mean square of past gradients.

    With learning rate ``lr_t = alpha * eta_{t-1}``, decay ``beta`` and
    ``epsilon``:

    ``r <- beta r + (1 - beta) g**2``;  ``theta <- theta - lr_t g / sqrt(epsilon + r)``

    ``r`` starts at zero. Formula as in Goodfellow, Bengio & Courville (2016),
    "Deep Learning", MIT Press, section 8.5.2, Algorithm 8.5 (from memory),
    with ``epsilon`` inside the square root as there.

    >>> import numpy as np
    >>> theta = np.array([1.0])
    >>> RMSProp(0.01, beta=0.9, epsilon=0.0).update([theta], [np.array([4.0])])
    >>> float(theta[0])  # 1 - 0.01 * 4 / sqrt(0.1 * 16)
    0.9683772233983162
    """

    _slot_names = ("mean_square",)

    def __init__(
        self,
        lr: float = 1e-3,
        beta: float = 0.9,
        epsilon: float = 1e-6,
        *,
        schedule: Schedule | None = None,
        clip_norm: float | None = None,
    ) -> None:
        super().__init__(lr, schedule=schedule, clip_norm=clip_norm)
        self.beta = real_in_range(beta, "beta", low=0.0, high=1.0, high_open=True)
        self.epsilon = real_in_range(epsilon, "epsilon", low=0.0)

    def _own_settings(self) -> dict[str, Any]:
        return {"beta": self.beta, "epsilon": self.epsilon}

    def _apply(
        self, slots: dict[str, list[np.ndarray]], scratch: list[np.ndarray], i: int, p: np.ndarray, g: np.ndarray,
        multiplier: float,
    ) -> None:
        r, work = slots["mean_square"][i], scratch[i]
        np.multiply(g, g, out=work)
        work *= 1.0 - self.beta
        r *= self.beta
        r += work
        np.add(r, self.epsilon, out=work)
        np.sqrt(work, out=work)
        np.divide(g, work, out=work)
        work *= self.lr * multiplier
        p -= work


class Adam(Optimizer):
    """Adam, with optional decoupled weight decay (the AdamW rule).

    Kingma & Ba (2015), "Adam: A Method for Stochastic Optimization", ICLR,
    Algorithm 1; decoupled decay from Loshchilov & Hutter (2019), "Decoupled
    Weight Decay Regularization", ICLR, Algorithm 2. For update ``t``
    (1-based) with schedule multiplier ``eta = eta_{t-1}``:

    ``m <- beta1 m + (1 - beta1) g``;  ``v <- beta2 v + (1 - beta2) g**2``

    ``m_hat = m / (1 - beta1**t)``;  ``v_hat = v / (1 - beta2**t)``

    ``theta <- theta - eta * (alpha * m_hat / (sqrt(v_hat) + epsilon) + decoupled_decay * theta)``

    ``m`` and ``v`` start at zero. ``decoupled_decay = lambda`` shrinks every
    parameter array it is given (biases too) towards zero, independently of
    the gradient; with ``lambda = 0`` this is plain Adam. It is not the same as
    an L2 penalty added to the loss, which Adam rescales per coordinate (the
    point of Loshchilov & Hutter's paper).

    >>> import numpy as np
    >>> theta = np.array([1.0, 1.0])
    >>> Adam(lr=0.1).update([theta], [np.array([3.0, -0.5])])
    >>> theta  # the first Adam step has size lr in every coordinate
    array([0.9, 1.1])
    """

    _slot_names = ("first_moment", "second_moment")

    def __init__(
        self,
        lr: float = 1e-3,
        beta1: float = 0.9,
        beta2: float = 0.999,
        epsilon: float = 1e-8,
        decoupled_decay: float = 0.0,
        *,
        schedule: Schedule | None = None,
        clip_norm: float | None = None,
    ) -> None:
        super().__init__(lr, schedule=schedule, clip_norm=clip_norm)
        self.beta1 = real_in_range(beta1, "beta1", low=0.0, high=1.0, high_open=True)
        self.beta2 = real_in_range(beta2, "beta2", low=0.0, high=1.0, high_open=True)
        self.epsilon = real_in_range(epsilon, "epsilon", low=0.0)
        self.decoupled_decay = real_in_range(decoupled_decay, "decoupled_decay", low=0.0)

    def _own_settings(self) -> dict[str, Any]:
        return {
            "beta1": self.beta1,
            "beta2": self.beta2,
            "epsilon": self.epsilon,
            "decoupled_decay": self.decoupled_decay,
        }

    def _apply(
        self, slots: dict[str, list[np.ndarray]], scratch: list[np.ndarray], i: int, p: np.ndarray, g: np.ndarray,
        multiplier: float,
    ) -> None:
        """Algorithm 1 in 12 elementwise passes (no pass divides by the bias corrections).

        ``m + (1 - beta1)(g - m)`` is the moment update rearranged, and with
        ``c1 = 1 - beta1**t``, ``c2 = 1 - beta2**t``:
        ``m_hat / (sqrt(v_hat) + epsilon) = (sqrt(c2) / c1) m / (sqrt(v) + epsilon sqrt(c2))``.
        """
        m, v, work = slots["first_moment"][i], slots["second_moment"][i], scratch[i]
        root_c2 = math.sqrt(1.0 - self.beta2**self.steps)
        np.subtract(g, m, out=work)
        work *= 1.0 - self.beta1
        m += work  # m <- beta1 m + (1 - beta1) g
        np.multiply(g, g, out=work)
        work -= v
        work *= 1.0 - self.beta2
        v += work  # v <- beta2 v + (1 - beta2) g**2
        np.sqrt(v, out=work)
        work += self.epsilon * root_c2
        np.divide(m, work, out=work)
        work *= multiplier * self.lr * root_c2 / (1.0 - self.beta1**self.steps)
        if self.decoupled_decay:
            p *= 1.0 - multiplier * self.decoupled_decay
        p -= work


_OPTIMIZERS: dict[str, type[Optimizer]] = {cls.__name__: cls for cls in (SGD, RMSProp, Adam)}


def optimizer_from_state(state: OptimizerState) -> Optimizer:
    """A new optimizer of ``state.kind`` with ``state.settings``, continuing from ``state``.

    This is how a checkpoint is resumed without knowing the optimizer class.
    """
    if not isinstance(state, OptimizerState):
        raise TypeError(f"state must be an OptimizerState, got {type(state).__name__}")
    if state.kind not in _OPTIMIZERS:
        raise ValueError(f"unknown optimizer kind {state.kind!r}; expected one of {sorted(_OPTIMIZERS)}")
    if not isinstance(state.settings, dict):
        raise TypeError(f"state.settings must be a dict, got {type(state.settings).__name__}")
    arguments = dict(state.settings)
    try:
        arguments["schedule"] = _schedule_from_settings(arguments.get("schedule"))
        optimizer = _OPTIMIZERS[state.kind](**arguments)
    except TypeError as exc:
        raise ValueError(f"state.settings do not fit {state.kind}: {exc}") from None
    optimizer.set_state(state)
    return optimizer
