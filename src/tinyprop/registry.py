"""Names under which activations are written to and read from model files.

A model file records an activation as a *registered name* plus its
``settings()`` dictionary, never as code. Loading looks the name up here and
rebuilds the activation as ``cls(**settings)``; a name that is not registered
in the loading program is refused, so opening a file can never run code the
program did not already import.

The built-in activations are registered under their class names (``"Tanh"``,
``"LeakyReLU"``, ...). Register your own once, before saving or loading::

    import tinyprop as tp
    from tinyprop.registry import register_activation

    @register_activation
    class Cube(tp.Activation):
        def value(self, z):
            return z ** 3
        def derivative(self, z, a):
            return 3 * z ** 2

A name is bound to one class for the life of the program: registering a name
that is already bound to a different class, or a class that is already
registered under a different name, raises ``ValueError``. Registering the same
class under the same name again does nothing.
"""

from __future__ import annotations

import re
import threading

from .activations import BUILT_IN_ACTIVATIONS, Activation

__all__ = ["register_activation", "activation_name", "activation_class", "registered_activations"]

NAME_PATTERN = re.compile(r"[A-Za-z_][A-Za-z0-9_.\-]{0,99}")
"""A registered name: an ASCII letter or ``_``, then up to 99 letters, digits, ``_ . -``."""

_lock = threading.Lock()
_by_name: dict[str, type[Activation]] = {}
_by_class: dict[type[Activation], str] = {}


def register_activation(cls: type[Activation], name: str | None = None) -> type[Activation]:
    """Register ``cls`` under ``name`` (default: ``cls.__name__``); return ``cls``.

    Usable as a decorator. ``cls`` must be a subclass of
    :class:`~tinyprop.Activation` whose ``settings()`` dictionary recreates an
    equal instance through ``cls(**settings)``; that property is checked when
    a network holding it is saved.
    """
    if not isinstance(cls, type) or not issubclass(cls, Activation) or cls is Activation:
        raise TypeError(f"register_activation expects a subclass of tinyprop.Activation, got {cls!r}")
    name = cls.__name__ if name is None else name
    if not isinstance(name, str) or not NAME_PATTERN.fullmatch(name):
        raise ValueError(
            "an activation name must start with an ASCII letter or '_' and continue with up to "
            f"99 letters, digits, '_', '.' or '-', got {name!r}"
        )
    with _lock:
        bound = _by_name.get(name)
        if bound is not None and bound is not cls:
            raise ValueError(
                f"activation name {name!r} is already registered for {_qualified(bound)}; "
                f"register {_qualified(cls)} under another name"
            )
        previous = _by_class.get(cls)
        if previous is not None and previous != name:
            raise ValueError(
                f"{_qualified(cls)} is already registered as {previous!r}; a class has one name"
            )
        _by_name[name] = cls
        _by_class[cls] = name
    return cls


def activation_name(activation: Activation) -> str | None:
    """The name registered for the exact class of ``activation``, or ``None``.

    Subclasses are not covered by their parent's registration: a subclass may
    change ``value`` or ``derivative`` and must be registered itself.
    """
    return _by_class.get(type(activation))


def activation_class(name: str) -> type[Activation] | None:
    """The class registered under ``name``, or ``None``."""
    return _by_name.get(name)


def registered_activations() -> dict[str, type[Activation]]:
    """A copy of the registry: name to class."""
    with _lock:
        return dict(_by_name)


def _qualified(cls: type) -> str:
    return f"{cls.__module__}.{cls.__qualname__}"


for _builtin in BUILT_IN_ACTIVATIONS:
    register_activation(_builtin)
