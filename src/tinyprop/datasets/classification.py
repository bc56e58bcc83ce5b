"""Public classification data: Palmer penguins (CC0) and Anderson's iris (public domain).

Bundled unchanged in ``classification/`` (see ``PROVENANCE.md``):

* ``penguins.csv``: 344 penguins of three species measured at Palmer Station,
  Antarctica (Gorman, Williams & Fraser (2014), PLoS ONE 9(3): e90081;
  packaged by Horst, Hill & Gorman (2020), doi:10.5281/zenodo.3960218; CC0).
  Missing values are written ``NA``.
* ``iris.csv``: 150 flowers of three iris species (Anderson (1935), used by
  Fisher (1936), Annals of Eugenics 7(2); the R ``datasets`` copy; public
  domain).

:func:`load_penguins` returns the species and the four body measurements; the
two rows whose measurements are all ``NA`` are left out (and listed in
``dropped_lines``), so 342 rows remain. ``sex`` is not used and its 9 further
``NA`` cells do not matter. ``load_penguins(target="sex")`` returns the sex
instead (a yes/no task: ``female`` or ``male``) on the 333 rows where it and
the measurements are recorded. :func:`load_iris` returns all 150 rows.

Only numpy and the standard library are used.
"""

from __future__ import annotations

import csv
import io
from dataclasses import dataclass
from importlib import resources

import numpy as np

__all__ = ["ClassificationDataset", "load_iris", "load_penguins"]

_PACKAGE = __package__ or "tinyprop.datasets"

PENGUINS_CITATION = (
    "Gorman, K. B., Williams, T. D. & Fraser, W. R. (2014), PLoS ONE 9(3): e90081; data packaged by "
    "Horst, A. M., Hill, A. P. & Gorman, K. B. (2020), palmerpenguins, doi:10.5281/zenodo.3960218 (CC0)"
)
IRIS_CITATION = (
    "Anderson, E. (1935), The irises of the Gaspe Peninsula; Fisher, R. A. (1936), Annals of Eugenics 7(2); "
    "copy of the R datasets package (public domain)"
)


@dataclass(frozen=True)
class ClassificationDataset:
    """Measurements ``X`` ``(n, d)`` and class labels ``labels`` ``(n,)`` (strings).

    ``input_names`` name the columns of ``X``; ``target_name`` the label column;
    ``dropped_lines`` the file lines (1-based, header = line 1) left out
    because a used cell was missing; ``citation`` the source and licence.
    """

    name: str
    X: np.ndarray
    labels: np.ndarray
    input_names: tuple[str, ...]
    target_name: str
    dropped_lines: tuple[int, ...]
    citation: str

    @property
    def classes(self) -> tuple[str, ...]:
        """The distinct labels, sorted."""
        return tuple(sorted(set(self.labels.tolist())))


def _rows(filename: str) -> list[list[str]]:
    text = resources.files(_PACKAGE).joinpath("classification", filename).read_text(encoding="utf-8")
    return list(csv.reader(io.StringIO(text)))


def _load(name: str, filename: str, inputs: tuple[str, ...], target: str, citation: str) -> ClassificationDataset:
    header, *body = _rows(filename)
    columns = [header.index(column) for column in inputs]
    label_column = header.index(target)
    kept, labels, dropped = [], [], []
    for line, row in enumerate(body, 2):
        cells = [row[j] for j in columns]
        if "NA" in cells or row[label_column] == "NA":
            dropped.append(line)
            continue
        kept.append([float(cell) for cell in cells])
        labels.append(row[label_column])
    return ClassificationDataset(
        name, np.array(kept, dtype=np.float64), np.array(labels), inputs, target, tuple(dropped), citation
    )


def load_penguins(target: str = "species") -> ClassificationDataset:
    """Penguin species (Adelie, Chinstrap, Gentoo), or sex, from bill length and depth, flipper length and body mass.

    ``target="species"``: 342 rows: the 2 rows (file lines 5 and 273) whose
    four measurements are all ``NA`` are left out. ``target="sex"``
    (``female``, ``male``): 333 rows, also leaving out the 9 rows whose sex
    is ``NA``. Units: millimetres and grams.

    >>> data = load_penguins()
    >>> data.X.shape, data.classes, data.dropped_lines
    ((342, 4), ('Adelie', 'Chinstrap', 'Gentoo'), (5, 273))
    >>> load_penguins(target="sex").classes
    ('female', 'male')
    """
    if target not in ("species", "sex"):
        raise ValueError(f"target must be 'species' or 'sex', got {target!r}")
    inputs = ("bill_length_mm", "bill_depth_mm", "flipper_length_mm", "body_mass_g")
    return _load("penguins", "penguins.csv", inputs, target, PENGUINS_CITATION)


def load_iris() -> ClassificationDataset:
    """Iris species (setosa, versicolor, virginica) from sepal and petal length and width (cm); 150 rows.

    >>> data = load_iris()
    >>> data.X.shape, data.classes
    ((150, 4), ('setosa', 'versicolor', 'virginica'))
    """
    inputs = ("Sepal.Length", "Sepal.Width", "Petal.Length", "Petal.Width")
    return _load("iris", "iris.csv", inputs, "Species", IRIS_CITATION)
