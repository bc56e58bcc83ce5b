"""UCI regression benchmark datasets with their 20 fixed train/test splits.

Bundled in ``uci/<name>/``: ``data.txt`` and the small ``index_*.txt`` /
``n_*.txt`` files copied unchanged, and ``splits.json``, which holds the row
indices of the 20 fixed 90/10 train/test splits of the Hernández-Lobato & Adams
(2015) protocol, repacked from the original ``index_train_K.txt`` /
``index_test_K.txt`` files with the order of every list kept.  See
``PROVENANCE.md``.

Only numpy and the standard library are used; files are located with
:mod:`importlib.resources`, so this works from an installed wheel.
"""

from __future__ import annotations

import io
import json
import operator
from dataclasses import dataclass, field
from importlib import resources

import numpy as np

__all__ = ["UciDataset", "load_uci", "uci_names"]

_PACKAGE = __package__ or "tinyprop.datasets"
_SUBDIR = "uci"

_REPOSITORY = (
    "Dua, D. & Graff, C. (2019), UCI Machine Learning Repository, "
    "University of California, Irvine (CC BY 4.0)"
)
_SPLITS = (
    "Splits: Hernández-Lobato, J. M. & Adams, R. P. (2015), 'Probabilistic "
    "Backpropagation for Scalable Learning of Bayesian Neural Networks', ICML"
)

# Paper citations as given in the shared reference-data README.  Column names
# follow the dataset descriptions in the UCI repository.
_META: dict[str, dict[str, object]] = {
    "concrete": {
        "paper": "Yeh, I-C. (1998), Cement and Concrete Research 28(12)",
        "feature_names": (
            "cement", "blast_furnace_slag", "fly_ash", "water",
            "superplasticizer", "coarse_aggregate", "fine_aggregate", "age_days",
        ),
        "target_name": "compressive_strength_MPa",
    },
    "energy": {
        "paper": "Tsanas, A. & Xifara, A. (2012), Energy and Buildings 49",
        "feature_names": (
            "relative_compactness", "surface_area", "wall_area", "roof_area",
            "overall_height", "orientation", "glazing_area",
            "glazing_area_distribution",
        ),
        "target_name": "heating_load",
    },
    "power-plant": {
        "paper": (
            "Tüfekci, P. (2014), International Journal of Electrical Power & "
            "Energy Systems 60"
        ),
        "feature_names": (
            "ambient_temperature", "exhaust_vacuum", "ambient_pressure",
            "relative_humidity",
        ),
        "target_name": "net_hourly_electrical_output_MW",
    },
}


@dataclass(frozen=True, eq=False)
class UciDataset:
    """One UCI regression dataset with its fixed train/test splits.

    ``X`` (n, d) and ``y`` (n,) are float64 and read-only.  ``feature_columns``
    and ``target_column`` are the 0-based columns of ``data.txt`` they came from.
    ``n_hidden`` (50) and ``n_epochs`` (40) are the protocol's network width and
    number of training epochs.  ``train_indices[k]`` / ``test_indices[k]`` are the
    0-based row indices of split ``k`` in their original order; use
    :meth:`split` to get the arrays.  ``citation`` names the dataset's paper, the
    repository and the split protocol; cite it beside any result on the data.
    """

    name: str
    X: np.ndarray = field(repr=False)
    y: np.ndarray = field(repr=False)
    feature_columns: tuple[int, ...]
    target_column: int
    n_hidden: int
    n_epochs: int
    n_splits: int
    citation: str = field(repr=False)
    feature_names: tuple[str, ...] = field(repr=False)
    target_name: str = field(repr=False)
    train_indices: tuple[np.ndarray, ...] = field(repr=False)
    test_indices: tuple[np.ndarray, ...] = field(repr=False)

    @property
    def n_rows(self) -> int:
        """Number of rows ``n``."""
        return int(self.X.shape[0])

    @property
    def n_features(self) -> int:
        """Number of input columns ``d``."""
        return int(self.X.shape[1])

    def split(self, k: int) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
        """Return ``(X_train, y_train, X_test, y_test)`` of fixed split ``k``.

        ``k`` runs over ``0 .. n_splits - 1``.  The returned arrays are new,
        writable copies, rows in the order of the original index files.
        """
        k = operator.index(k)
        if not 0 <= k < self.n_splits:
            raise IndexError(f"split {k} out of range 0..{self.n_splits - 1}")
        tr, te = self.train_indices[k], self.test_indices[k]
        return self.X[tr], self.y[tr], self.X[te], self.y[te]


def uci_names() -> tuple[str, ...]:
    """Names of the bundled UCI datasets (sorted)."""
    root = resources.files(_PACKAGE).joinpath(_SUBDIR)
    return tuple(
        sorted(
            entry.name
            for entry in root.iterdir()
            if entry.is_dir() and entry.joinpath("splits.json").is_file()
        )
    )


def _readonly(arr: np.ndarray) -> np.ndarray:
    arr.flags.writeable = False
    return arr


def _ints(text: str) -> list[int]:
    return [int(tok) for tok in text.split()]


def load_uci(name: str) -> UciDataset:
    """Load the bundled UCI dataset ``name`` (see :func:`uci_names`).

    Matching ignores case and treats ``_`` as ``-`` (``"power_plant"`` works).
    Raises ``ValueError`` for an unknown name or inconsistent bundled files.
    """
    if not isinstance(name, str):
        raise TypeError(f"name must be a str, got {type(name).__name__}")
    available = uci_names()
    key = name.strip().lower().replace("_", "-")
    if key not in available:
        raise ValueError(f"unknown UCI dataset {name!r}; available: {', '.join(available)}")

    folder = resources.files(_PACKAGE).joinpath(_SUBDIR).joinpath(key)

    def read(fname: str) -> str:
        return folder.joinpath(fname).read_text(encoding="utf-8")

    data = np.loadtxt(io.StringIO(read("data.txt")), dtype=np.float64, ndmin=2)
    feature_columns = tuple(_ints(read("index_features.txt")))
    (target_column,) = _ints(read("index_target.txt"))
    (n_hidden,) = _ints(read("n_hidden.txt"))
    (n_epochs,) = _ints(read("n_epochs.txt"))
    (n_splits,) = _ints(read("n_splits.txt"))
    splits = json.loads(read("splits.json"))

    n = data.shape[0]
    if splits["n_rows"] != n or splits["n_splits"] != n_splits:
        raise ValueError(f"{key}: splits.json does not match data.txt / n_splits.txt")
    if len(splits["train"]) != n_splits or len(splits["test"]) != n_splits:
        raise ValueError(f"{key}: splits.json does not hold {n_splits} splits")
    train, test = [], []
    for k in range(n_splits):
        tr = np.asarray(splits["train"][k], dtype=np.int64)
        te = np.asarray(splits["test"][k], dtype=np.int64)
        both = np.concatenate([tr, te])
        if both.size != n or both.min() < 0 or both.max() >= n or np.any(np.bincount(both, minlength=n) != 1):
            raise ValueError(f"{key}: split {k} is not a partition of the {n} rows")
        train.append(_readonly(tr))
        test.append(_readonly(te))

    meta = _META.get(key, {})
    feature_names = tuple(meta.get("feature_names", ()))  # type: ignore[arg-type]
    if len(feature_names) != len(feature_columns):
        feature_names = tuple(f"x{j}" for j in feature_columns)
    paper = meta.get("paper")
    citation = "; ".join(str(s) for s in (paper, _REPOSITORY, _SPLITS) if s)

    return UciDataset(
        name=key,
        X=_readonly(np.ascontiguousarray(data[:, list(feature_columns)])),
        y=_readonly(np.ascontiguousarray(data[:, target_column])),
        feature_columns=feature_columns,
        target_column=int(target_column),
        n_hidden=int(n_hidden),
        n_epochs=int(n_epochs),
        n_splits=int(n_splits),
        citation=citation,
        feature_names=feature_names,
        target_name=str(meta.get("target_name", f"column_{target_column}")),
        train_indices=tuple(train),
        test_indices=tuple(test),
    )
