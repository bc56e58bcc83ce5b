"""Lookup tables with linear interpolation: tanh and the logistic sigmoid in integer arithmetic.

Both functions are evaluated on ``u = |z|`` from one table of ``f`` at the
knots ``u_i = i h``, ``h = 2**-STEP_BITS``, ``i = 0 .. N``, stored in Q14
(``OUT_BITS = 14`` fractional bits, 1.0 is 16384) as ``T[i] =
round(f(u_i) 2**14)``, round half away from zero. The other half line
follows from symmetry: ``tanh(-u) = -tanh(u)`` and ``sigmoid(-u) = 1 -
sigmoid(u)``, so the result is odd (tanh) or point-symmetric about 1/2
(sigmoid) bit for bit.

For an input ``z_q`` with ``F`` fractional bits (``z = z_q / 2**F``), ``u_q =
|z_q|`` and, with ``t = F - STEP_BITS``:

- ``t >= 0``: ``i = u_q >> t`` and ``r = u_q - (i << t)``; the result is ``T[i]
  + round((T[i+1] - T[i]) r / 2**t)`` (the product is never negative because
  both functions increase on ``u >= 0``; round half up, which is half away from
  zero here);
- ``t < 0``: every representable ``u`` is a knot, ``i = u_q 2**-t``, result ``T[i]``;
- ``i >= N`` (``u >= N h``, the end of the table): ``T[N]``.

==========  ==========  ========  =======  =============================================
function    table       step h    entries  worst-case error of the result (bound)
==========  ==========  ========  =======  =============================================
Tanh        u in [0, 8]   1/64    513      2**-15 + 2**-15 + h**2/8 * 0.7699 = 8.45e-5
Sigmoid     u in [0, 16]  1/32    513      2**-15 + 2**-15 + h**2/8 * 0.0963 = 7.28e-5
==========  ==========  ========  =======  =============================================

The bound, in units of the function value, adds: half a Q14 step for rounding
the table entries (linear interpolation between two rounded entries is off by
at most the larger of their errors), half a Q14 step for rounding the
interpolated value, and the interpolation error of a straight line between
two knots, ``h**2 / 8 * max |f''|`` (a standard result for linear
interpolation, e.g. Burden & Faires, *Numerical Analysis*, theorem 3.3 with
``n = 1``); ``max |tanh''| = 4 / (3 sqrt 3) = 0.7698`` at ``u = atanh(1/sqrt
3)`` and ``max |sigmoid''| = 1 / (6 sqrt 3) = 0.0962`` (both handbook
derivatives, evaluated by hand; the constants above are rounded up). Beyond
the table's end the result is ``T[N]``: ``1 - tanh(8) = 2.3e-7`` and ``1 -
sigmoid(16) = 1.1e-7``, both far inside the rounding term. The tests measure
the error against Python's ``math.tanh`` and ``1 / (1 + exp(-z))`` on a fine
grid of inputs and several input formats.

The error is that of the function at the quantised input ``z_q / 2**F``;
the quantisation of ``z`` itself is accounted for by the layer before.

Each class declares its table (step, entries, ``max |f''|``) as its
``_fixed_point_form`` in :mod:`tinyprop.activations`.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ..activations import BUILT_IN_ACTIVATIONS, Activation, IntegerTable, declared

__all__ = ["OUT_BITS", "Table", "TABLES", "table_for", "lookup", "c_function", "round_half_away"]

OUT_BITS = 14
ONE = 1 << OUT_BITS


def round_half_away(values: np.ndarray) -> np.ndarray:
    """Round float64 values to the nearest integer, ties away from zero, exactly (as int64)."""
    values = np.asarray(values, dtype=np.float64)
    whole = np.trunc(values)
    rest = values - whole  # exact: |rest| < 1 and whole shares the binary exponent range
    return (whole + np.sign(values) * (np.abs(rest) >= 0.5)).astype(np.int64)


@dataclass(frozen=True)
class Table:
    """A lookup table of ``f`` on ``[0, N h]`` in Q14, with its symmetry and error bound."""

    kind: str               # "tanh" or "sigmoid": names the C function and the symmetry
    step_bits: int          # h = 2**-step_bits
    intervals: int          # N: knots 0 .. N
    max_second_derivative: float
    values: tuple[int, ...]

    @property
    def step(self) -> float:
        return 2.0 ** -self.step_bits

    @property
    def end(self) -> float:
        return self.intervals * self.step

    @property
    def error_bound(self) -> float:
        """Worst-case ``|result - f(z_q / 2**F)|``, in function units (see the module docstring)."""
        return 2.0 ** -(OUT_BITS + 1) * 2 + self.step ** 2 / 8 * self.max_second_derivative

    def describe(self) -> str:
        return (f"{self.kind} table: |z| in [0, {self.end:g}] in steps of 1/{1 << self.step_bits}, "
                f"{self.intervals + 1} int16 entries in Q{OUT_BITS}, linear interpolation, "
                f"worst-case error {self.error_bound:.3g}")


def _make(spec: IntegerTable) -> Table:
    knots = np.arange(spec.intervals + 1, dtype=np.float64) * 2.0 ** -spec.step_bits
    values = round_half_away(np.array([spec.function(u) for u in knots]) * ONE)
    return Table(spec.kind, spec.step_bits, spec.intervals, spec.max_second_derivative, tuple(int(v) for v in values))


def _declared_table(activation: Activation) -> IntegerTable | None:
    """The table ``activation`` declares as its fixed-point form (``_fixed_point_form``), else ``None``."""
    spec = declared(activation, "_fixed_point_form")
    return spec if isinstance(spec, IntegerTable) else None


TABLES = {cls: _make(spec) for cls in BUILT_IN_ACTIVATIONS if (spec := _declared_table(cls())) is not None}
"""The tables of the built-in classes, built once at import."""


def table_for(activation: Activation) -> Table | None:
    """The table ``activation`` declares (built once for the built-ins), else ``None``."""
    spec = _declared_table(activation)
    if spec is None:
        return None
    return TABLES[type(activation)] if type(activation) in TABLES else _make(spec)


def lookup(table: Table, z_q: np.ndarray, frac_bits: int) -> np.ndarray:
    """The table's result (int64, Q14) for inputs ``z_q`` with ``frac_bits`` fractional bits."""
    values = np.array(table.values, dtype=np.int64)
    z_q = np.asarray(z_q, dtype=np.int64)
    u = np.abs(z_q)
    t = frac_bits - table.step_bits
    if t >= 0:
        beyond = u >= (table.intervals << t)
        i = np.minimum(u >> t, table.intervals - 1)
        r = u - (i << t)
        interpolated = values[i] + (((values[i + 1] - values[i]) * r + ((1 << t) >> 1)) >> t)
    else:
        beyond = u >= -(-table.intervals >> -t)  # u * 2**-t >= N, i.e. u >= ceil(N / 2**-t)
        interpolated = values[np.minimum(u << -t, table.intervals)]
    result = np.where(beyond, values[table.intervals], interpolated)
    if table.kind == "tanh":
        return np.where(z_q < 0, -result, result)
    return np.where(z_q < 0, ONE - result, result)


def c_function(table: Table, prefix: str, frac_bits: int) -> tuple[str, list[str]]:
    """``(name, lines)`` of ``static int16_t <name>(int16_t z)`` for inputs with ``frac_bits`` bits.

    Expects the array ``<prefix>_<kind>_table`` to be defined. The arithmetic is
    that of :func:`lookup`; every shift is of a non-negative value.
    """
    name = f"{prefix}_{table.kind}_q{frac_bits}".replace("-", "m")
    t = frac_bits - table.step_bits
    array = f"{prefix}_{table.kind}_table"
    lines = [f"static int16_t {name}(int16_t z)", "{",
             "    const int32_t u = z < 0 ? -(int32_t)z : (int32_t)z;",
             "    int32_t v;"]
    if t >= 0:
        limit = table.intervals << t
        if limit <= 32768:
            lines += [f"    if (u >= {limit}) {{", f"        v = {array}[{table.intervals}];", "    } else {"]
        else:
            lines += ["    {"]
        lines += [f"        const int32_t i = u >> {t};",
                  f"        const int32_t r = u - (i << {t});",
                  f"        v = {array}[i] + ((({array}[i + 1] - {array}[i]) * r + {(1 << t) >> 1}) >> {t});",
                  "    }"]
    else:
        limit = -(-table.intervals >> -t)
        lines += [f"    v = u >= {limit} ? {array}[{table.intervals}] : {array}[u << {-t}];"]
    if table.kind == "tanh":
        lines.append("    return (int16_t)(z < 0 ? -v : v);")
    else:
        lines.append(f"    return (int16_t)(z < 0 ? {ONE} - v : v);")
    lines.append("}")
    return name, lines
