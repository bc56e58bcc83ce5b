"""NIST StRD nonlinear-regression reference problems.

The ``.dat`` files in ``nist/`` are copied unchanged from the NIST/ITL
Statistical Reference Datasets (https://www.itl.nist.gov/div898/strd/, public
domain); see ``PROVENANCE.md``.  Each file holds the observations, two vectors of
starting values and the certified least-squares solution (parameters, their
standard deviations, residual sum of squares, residual standard deviation and
degrees of freedom).

Only numpy and the standard library are used; files are located with
:mod:`importlib.resources`, so this works from an installed wheel.
"""

from __future__ import annotations

import re
from dataclasses import dataclass, field
from importlib import resources

import numpy as np

__all__ = ["NistProblem", "load_nist", "nist_names", "parse_nist"]

_PACKAGE = __package__ or "tinyprop.datasets"
_SUBDIR = "nist"


@dataclass(frozen=True, eq=False)
class NistProblem:
    """One NIST StRD nonlinear least-squares problem, as stated in its file.

    All arrays are float64 and read-only.  ``x`` has shape ``(n, 1)`` (one
    predictor), ``y`` has shape ``(n,)``; ``start1``, ``start2``, ``certified``
    and ``certified_sd`` have shape ``(k,)`` and hold the values of ``b1..bk`` in
    order.  ``model`` is the model line(s) of the file, joined by one space, for
    example ``"y = b1 / (1+exp[b2-b3*x])  +  e"``.

    ``degrees_of_freedom`` is the value printed in the file.  For Rat43 the
    published file prints 9 although ``n - k = 11``; its certified residual
    standard deviation equals ``sqrt(certified_rss / 11)``.  Use
    ``n_observations - n_parameters`` when the degrees of freedom matter.
    """

    name: str
    model: str
    x: np.ndarray = field(repr=False)
    y: np.ndarray = field(repr=False)
    start1: np.ndarray
    start2: np.ndarray
    certified: np.ndarray
    certified_sd: np.ndarray = field(repr=False)
    certified_rss: float
    certified_residual_sd: float = field(repr=False)
    degrees_of_freedom: int = field(repr=False)

    @property
    def n_observations(self) -> int:
        """Number of observations ``n``."""
        return int(self.y.shape[0])

    @property
    def n_parameters(self) -> int:
        """Number of model parameters ``k``."""
        return int(self.certified.shape[0])


def nist_names() -> tuple[str, ...]:
    """Names of the bundled NIST StRD problems (file stems, sorted)."""
    root = resources.files(_PACKAGE).joinpath(_SUBDIR)
    names = [
        entry.name[: -len(".dat")]
        for entry in root.iterdir()
        if entry.is_file() and entry.name.endswith(".dat")
    ]
    return tuple(sorted(names, key=str.lower))


def load_nist(name: str) -> NistProblem:
    """Load and parse the bundled NIST StRD file ``<name>.dat``.

    ``name`` is matched case-insensitively against :func:`nist_names`
    (e.g. ``"Rat42"`` or ``"rat42"``).  Raises ``ValueError`` for an unknown name.
    """
    if not isinstance(name, str):
        raise TypeError(f"name must be a str, got {type(name).__name__}")
    available = nist_names()
    lookup = {n.lower(): n for n in available}
    canonical = lookup.get(name.strip().lower())
    if canonical is None:
        raise ValueError(
            f"unknown NIST StRD problem {name!r}; available: {', '.join(available)}"
        )
    text = (
        resources.files(_PACKAGE)
        .joinpath(_SUBDIR)
        .joinpath(canonical + ".dat")
        .read_text(encoding="ascii")
    )
    return parse_nist(text, name=canonical)


# --------------------------------------------------------------------------- #
# parsing

_FLOAT = r"[-+]?(?:\d+\.?\d*|\.\d+)(?:[eE][-+]?\d+)?"
_RE_DATASET_NAME = re.compile(r"^\s*Dataset Name:\s*(\S+)")
_RE_DATA_LINES = re.compile(r"^\s*Data\s+\(lines\s+(\d+)\s+to\s+(\d+)\)", re.M)
_RE_START_LINES = re.compile(r"^\s*Starting Values\s+\(lines\s+(\d+)\s+to\s+(\d+)\)", re.M)
_RE_N_PARAMS = re.compile(r"^\s*(\d+)\s+Parameters\b", re.M)
_RE_N_OBS_HEADER = re.compile(r"^\s*(\d+)\s+Observations\b", re.M)
_RE_PARAM = re.compile(
    rf"^\s*b(\d+)\s*=\s*({_FLOAT})\s+({_FLOAT})\s+({_FLOAT})\s+({_FLOAT})\s*$"
)


def _labelled(text: str, label: str) -> str:
    """Return the value after ``label:`` on the unique line that starts with it."""
    pattern = re.compile(rf"^\s*{re.escape(label)}:\s*(\S+)\s*$", re.M)
    hits = pattern.findall(text)
    if len(hits) != 1:
        raise ValueError(f"expected exactly one '{label}:' line, found {len(hits)}")
    return hits[0]


def _readonly(values: list[float] | np.ndarray, shape: tuple[int, ...] | None = None) -> np.ndarray:
    arr = np.array(values, dtype=np.float64)
    if shape is not None:
        arr = arr.reshape(shape)
    arr.flags.writeable = False
    return arr


def _model_text(lines: list[str]) -> str:
    """The model formula: the non-blank lines after 'N Parameters (...)'."""
    for i, line in enumerate(lines):
        if _RE_N_PARAMS.match(line):
            start = i + 1
            break
    else:
        raise ValueError("no 'N Parameters' line found")
    while start < len(lines) and not lines[start].strip():
        start += 1
    parts: list[str] = []
    for line in lines[start:]:
        if not line.strip():
            break
        parts.append(line.strip())
    model = " ".join(parts)
    if not model.startswith("y ="):
        raise ValueError(f"unexpected model text: {model!r}")
    return model


def parse_nist(text: str, *, name: str | None = None) -> NistProblem:
    """Parse the text of a NIST StRD nonlinear-regression ``.dat`` file.

    Parameter lines are found by content (``b1 = start1 start2 certified sd``),
    summary statistics by their labels, and the data block from the header line
    ``Data (lines A to B)`` (1-based, inclusive).  The column order of the data
    block is taken from its ``Data:  y  x`` heading.  Counts stated in the header
    are cross-checked; any inconsistency raises ``ValueError``.
    """
    lines = text.splitlines()

    if name is None:
        for line in lines:
            m = _RE_DATASET_NAME.match(line)
            if m:
                name = m.group(1)
                break
        else:
            raise ValueError("no 'Dataset Name:' line found")

    # --- parameters: start1, start2, certified value, certified sd
    rows: dict[int, tuple[float, float, float, float]] = {}
    for line in lines:
        m = _RE_PARAM.match(line)
        if m:
            j = int(m.group(1))
            if j in rows:
                raise ValueError(f"parameter b{j} appears twice")
            rows[j] = (float(m.group(2)), float(m.group(3)), float(m.group(4)), float(m.group(5)))
    k = len(rows)
    if k == 0 or sorted(rows) != list(range(1, k + 1)):
        raise ValueError(f"parameter lines are not b1..bk: found {sorted(rows)}")
    m_np = _RE_N_PARAMS.search(text)
    if m_np is None or int(m_np.group(1)) != k:
        raise ValueError(f"header parameter count does not match {k} parameter lines")
    m_sl = _RE_START_LINES.search(text)
    if m_sl is not None and int(m_sl.group(2)) - int(m_sl.group(1)) + 1 != k:
        raise ValueError("'Starting Values (lines A to B)' does not match parameter count")
    table = np.array([rows[j] for j in range(1, k + 1)], dtype=np.float64)

    # --- summary statistics
    rss = float(_labelled(text, "Residual Sum of Squares"))
    res_sd = float(_labelled(text, "Residual Standard Deviation"))
    dof = int(_labelled(text, "Degrees of Freedom"))
    n_obs = int(_labelled(text, "Number of Observations"))

    # --- data block
    m_dl = _RE_DATA_LINES.search(text)
    if m_dl is None:
        raise ValueError("no 'Data (lines A to B)' header line found")
    first, last = int(m_dl.group(1)), int(m_dl.group(2))
    if not (1 <= first <= last <= len(lines)):
        raise ValueError(f"data lines {first}..{last} outside file of {len(lines)} lines")
    heading = lines[first - 2].split() if first >= 2 else []
    if heading[:1] != ["Data:"] or sorted(heading[1:]) != ["x", "y"]:
        raise ValueError(f"unexpected data heading on line {first - 1}: {lines[first - 2]!r}")
    iy, ix = heading[1:].index("y"), heading[1:].index("x")
    values = []
    for lineno in range(first, last + 1):
        tokens = lines[lineno - 1].split()
        if len(tokens) != 2:
            raise ValueError(f"line {lineno}: expected 2 numbers, got {lines[lineno - 1]!r}")
        values.append([float(t) for t in tokens])
    data = np.array(values, dtype=np.float64)
    n = data.shape[0]
    if n != n_obs:
        raise ValueError(f"{n} data rows but 'Number of Observations: {n_obs}'")
    m_no = _RE_N_OBS_HEADER.search(text)
    if m_no is not None and int(m_no.group(1)) != n:
        raise ValueError(f"{n} data rows but header says {m_no.group(1)} Observations")
    # ``dof`` is kept exactly as printed and deliberately not checked against
    # n - k: the published Rat43.dat says 9, while n - k = 11 (and its certified
    # residual standard deviation equals sqrt(RSS / 11)).

    return NistProblem(
        name=name,
        model=_model_text(lines),
        x=_readonly(data[:, ix], (n, 1)),
        y=_readonly(data[:, iy]),
        start1=_readonly(table[:, 0]),
        start2=_readonly(table[:, 1]),
        certified=_readonly(table[:, 2]),
        certified_sd=_readonly(table[:, 3]),
        certified_rss=rss,
        certified_residual_sd=res_sd,
        degrees_of_freedom=dof,
    )
