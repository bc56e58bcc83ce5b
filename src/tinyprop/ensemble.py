"""Ensembles: several networks with the same inputs and outputs, averaged.

For members ``f_1 .. f_M`` and an input ``x``::

    mean(x)   = (f_1(x) + f_2(x) + ... + f_M(x)) / M                  (summed in member order)
    spread(x) = sqrt(((f_1(x) - mean(x))**2 + ... + (f_M(x) - mean(x))**2) / M)

``spread`` is the standard deviation of the members' outputs with divisor
``M`` (the spread of the equally weighted set of members itself); multiply by
``sqrt(M / (M - 1))`` for the sample standard deviation. It measures how much
networks trained alike disagree, not the noise in the targets.

An ensemble is saved as one archive (:mod:`tinyprop.archive`): every member's
model file (:func:`tinyprop.modelfile.save`, ``docs/model-file.md``) with its arrays
renamed ``member<k>/<name>`` and its manifest in the list ``"members"``; each
member is verified on loading exactly as :func:`tinyprop.modelfile.load_model_file`
verifies a model file. ``docs/sweeps.md`` gives the layout.

Exported inference code computes the mean (:mod:`tinyprop.export.ensemble`).

Not certified for safety functions: validation against the applicable
functional-safety standards, local codes and qualified review is the user's
responsibility.
"""

from __future__ import annotations

import os
from collections.abc import Mapping, Sequence
from pathlib import Path
from typing import Any

import numpy as np

from ._json import canonical_json, json_copy, sha256_hex
from ._validate import as_samples
from .archive import ArchiveError, check_json, read_archive, write_archive
from .export import agreement_bound
from .export.ensemble import export_ensemble_c, export_ensemble_python
from .modelfile import ModelFileError, fingerprint, model_from_parts, model_parts
from .network import Network

__all__ = ["Ensemble"]

ENSEMBLE_FORMAT = "tinyprop-ensemble"
ENSEMBLE_FORMAT_VERSION = 1
FINGERPRINT_FORMAT = "tinyprop-ensemble-fingerprint"
FINGERPRINT_VERSION = 1
_MANIFEST_KEYS = ("format", "format_version", "tinyprop_version", "n_members", "fingerprint", "members", "metadata")


class Ensemble:
    """The mean and spread of several networks (see the module docstring for the formulas).

    ``networks``: one or more :class:`~tinyprop.network.Network` with equal
    ``n_in``, ``n_out`` and dtype; the ensemble keeps copies, so later changes
    to them do not reach it. ``metadata``: a dict of JSON values kept with the
    ensemble and saved in its file.

    >>> import numpy as np, tinyprop as tp
    >>> members = [tp.Network([tp.Affine(1, 1)], init=None) for _ in range(2)]
    >>> members[0].set_vector([1.0, 0.0]); members[1].set_vector([3.0, 0.0])
    >>> mean, spread = tp.Ensemble(members).predict_with_spread([[2.0]])
    >>> float(mean[0, 0]), float(spread[0, 0])  # outputs 2 and 6
    (4.0, 2.0)
    """

    def __init__(self, networks: Sequence[Network], *, metadata: Mapping[str, Any] | None = None) -> None:
        if isinstance(networks, Network) or not isinstance(networks, Sequence):
            raise TypeError(f"networks must be a list of tinyprop Networks, got {type(networks).__name__}")
        if len(networks) == 0:
            raise ValueError("an ensemble needs at least one network, got an empty list")
        for index, net in enumerate(networks):
            if not isinstance(net, Network):
                raise TypeError(f"networks[{index}] must be a tinyprop Network, got {type(net).__name__}")
        first = networks[0]
        for index, net in enumerate(networks[1:], 1):
            if (net.n_in, net.n_out, net.dtype) != (first.n_in, first.n_out, first.dtype):
                raise ValueError(
                    f"every member must have the inputs, outputs and dtype of networks[0] ({first.n_in} -> "
                    f"{first.n_out}, {first.dtype}); networks[{index}] has {net.n_in} -> {net.n_out}, {net.dtype}"
                )
        if metadata is not None and not isinstance(metadata, Mapping):
            raise TypeError(f"metadata must be a dict of JSON values or None, got {type(metadata).__name__}")
        try:
            check_json(dict(metadata or {}), "metadata")
        except ArchiveError as exc:
            raise ValueError(str(exc)) from None
        self.metadata: dict[str, Any] = json_copy(dict(metadata or {}))
        self.members: tuple[Network, ...] = tuple(net.copy() for net in networks)

    @property
    def n_members(self) -> int:
        """``M``, the number of member networks."""
        return len(self.members)

    @property
    def n_in(self) -> int:
        """Inputs per sample."""
        return self.members[0].n_in

    @property
    def n_out(self) -> int:
        """Outputs per sample."""
        return self.members[0].n_out

    @property
    def dtype(self) -> np.dtype:
        """The members' dtype; predictions are in it."""
        return self.members[0].dtype

    def __repr__(self) -> str:
        return f"Ensemble({self.n_members} members, {self.n_in} -> {self.n_out}, {self.dtype.name})"

    # ------------------------------------------------------------ prediction
    def member_predictions(self, X: Any) -> np.ndarray:
        """Every member's output: an array ``(M, n, n_out)``, ``[k]`` from member ``k``."""
        X = as_samples(X, "X", self.n_in, self.dtype)
        return np.stack([net.predict(X) for net in self.members])

    def predict(self, X: Any) -> np.ndarray:
        """The mean of the members' outputs, ``(n, n_out)``, summed in member order then divided by ``M``."""
        return self.predict_with_spread(X)[0]

    def predict_with_spread(self, X: Any) -> tuple[np.ndarray, np.ndarray]:
        """``(mean, spread)``, each ``(n, n_out)``; spread is the standard deviation with divisor ``M``."""
        outputs = self.member_predictions(X)
        total = outputs[0].copy()
        for output in outputs[1:]:
            total += output
        mean = total / self.n_members
        deviation = outputs - mean
        spread = np.sqrt(np.sum(deviation * deviation, axis=0) / self.n_members)
        return mean, spread

    def agreement_bound(self, X: Any, *, dtype: Any = None, function_ulps: float = 4.0) -> np.ndarray:
        """Bound on ``|mean_a - mean_b|`` for two evaluations of the mean at ``X`` in ``dtype``.

        With ``b_k`` the bound of member ``k``
        (:func:`tinyprop.export.agreement_bound`), ``y_k`` its output, ``u``
        the unit roundoff of ``dtype`` and ``gamma = (M-1) u / (1 - (M-1) u)``
        (the ``M - 1`` rounded additions of a sum of ``M`` terms, Higham,
        *Accuracy and Stability of Numerical Algorithms*, 2nd ed., section 3.1)::

            (sum b_k + 2 (gamma + u) sum (|y_k| + b_k)) / M

        (``|y_k| + b_k`` bounds member ``k``'s output in either evaluation; the
        ``u`` term is the rounding of the division), plus one smallest
        subnormal per rounding, times 1.01 for second-order terms. This is the
        tolerance for comparing exported code with
        :meth:`predict` of ``Ensemble([m.copy(dtype) for m in members])``.
        """
        dtype = np.dtype(self.dtype if dtype is None else dtype)
        members = [net.copy(dtype=dtype) for net in self.members]
        X = as_samples(X, "X", self.n_in, dtype)
        bounds = np.stack([agreement_bound(net, X, dtype=dtype, function_ulps=function_ulps) for net in members])
        outputs = np.abs(np.stack([net.predict(X) for net in members]).astype(np.float64))
        u = float(np.finfo(dtype).eps) / 2
        tiny = float(np.finfo(dtype).smallest_subnormal)
        m = self.n_members
        gamma = (m - 1) * u / (1 - (m - 1) * u)
        magnitude = (outputs + bounds).sum(axis=0)
        bound = (bounds.sum(axis=0) + 2 * (gamma + u) * magnitude) / m
        return 1.01 * (bound + 2 * (m + 1) * tiny)

    # ------------------------------------------------------------ identity and files
    def fingerprint(self) -> str:
        """SHA-256 hex digest of ``{"format", "version", "members": [member fingerprints in order]}``.

        The canonical JSON (sorted keys, no spaces, ASCII) of
        ``{"format": "tinyprop-ensemble-fingerprint", "version": 1, "members": [...]}``
        with each member's :func:`tinyprop.modelfile.fingerprint`. Metadata is not included.
        """
        description = {"format": FINGERPRINT_FORMAT, "version": FINGERPRINT_VERSION,
                       "members": [fingerprint(net) for net in self.members]}
        return sha256_hex(canonical_json(description))

    def save(self, path: str | os.PathLike[str]) -> str:
        """Write the ensemble (members and metadata) to one file, atomically; return its fingerprint.

        Every member becomes what :func:`tinyprop.modelfile.save` would write
        (:func:`tinyprop.modelfile.model_parts`: same checks, same
        :class:`~tinyprop.modelfile.ModelFileError`); the file is written by
        :func:`tinyprop.archive.write_archive`, so a failure leaves an earlier
        file at ``path`` as it was.
        """
        arrays: dict[str, np.ndarray] = {}
        manifests = []
        for index, net in enumerate(self.members):
            member_arrays, manifest = model_parts(net)
            arrays.update({f"member{index}/{name}": array for name, array in member_arrays.items()})
            manifests.append(manifest)
        digest = self.fingerprint()
        manifest = {
            "format": ENSEMBLE_FORMAT,
            "format_version": ENSEMBLE_FORMAT_VERSION,
            "tinyprop_version": manifests[0]["tinyprop_version"],
            "n_members": self.n_members,
            "fingerprint": digest,
            "members": manifests,
            "metadata": self.metadata,
        }
        try:
            write_archive(path, arrays, manifest)
        except ModelFileError:
            raise
        except ArchiveError as exc:
            raise ModelFileError(str(exc)) from None
        return digest

    @classmethod
    def load(cls, path: str | os.PathLike[str]) -> "Ensemble":
        """Read an ensemble file, verify every member and the ensemble fingerprint, rebuild it.

        Raises :class:`~tinyprop.modelfile.ModelFileError` naming the file and what is
        wrong, or ``OSError`` if it cannot be read.
        """
        try:
            arrays, manifest = read_archive(path)
            return cls._from_parts(arrays, manifest)
        except ArchiveError as exc:  # ModelFileError included
            raise ModelFileError(f"{os.fspath(path)}: {exc}") from None

    @classmethod
    def _from_parts(cls, arrays: dict[str, np.ndarray], manifest: dict[str, Any]) -> "Ensemble":
        if sorted(manifest) != sorted(_MANIFEST_KEYS):
            raise ModelFileError(f"manifest fields must be exactly {list(_MANIFEST_KEYS)}, found {sorted(manifest)}")
        if manifest["format"] != ENSEMBLE_FORMAT or manifest["format_version"] != ENSEMBLE_FORMAT_VERSION:
            raise ModelFileError(
                f"not a version-{ENSEMBLE_FORMAT_VERSION} {ENSEMBLE_FORMAT} file: format {manifest['format']!r}, "
                f"format_version {manifest['format_version']!r}"
            )
        members, count = manifest["members"], manifest["n_members"]
        if not isinstance(members, list) or not members or count != len(members) or isinstance(count, bool):
            raise ModelFileError(f"'n_members' ({count!r}) must equal the length of a non-empty 'members' list")
        if not all(isinstance(member, dict) for member in members):
            raise ModelFileError("every entry of 'members' must be a model-file manifest (a JSON object)")
        if not isinstance(manifest["metadata"], dict):
            raise ModelFileError(f"'metadata' must be an object, found {type(manifest['metadata']).__name__}")
        grouped: list[dict[str, np.ndarray]] = [{} for _ in members]
        for name, array in arrays.items():
            head, _, rest = name.partition("/")
            index = head[len("member"):]
            if not head.startswith("member") or not index.isdigit() or str(int(index)) != index or int(index) >= count:
                raise ModelFileError(f"array {name!r} belongs to no member (names are member<k>/..., k < {count})")
            grouped[int(index)][rest] = array
        networks = []
        for index, (member_arrays, member_manifest) in enumerate(zip(grouped, members)):
            try:
                networks.append(model_from_parts(member_arrays, member_manifest).network)
            except ArchiveError as exc:  # ModelFileError included
                raise ModelFileError(f"member {index}: {exc}") from None
        ensemble = cls(networks, metadata=manifest["metadata"])
        if ensemble.fingerprint() != manifest["fingerprint"]:
            raise ModelFileError(
                f"ensemble fingerprint mismatch: the manifest lists {manifest['fingerprint']!r}, the members give "
                f"{ensemble.fingerprint()}; members were reordered, added or removed after saving"
            )
        return ensemble

    # ------------------------------------------------------------ inference code
    def export_python(
        self, path: str | os.PathLike[str], *, name: str = "ensemble", metadata: Mapping[str, Any] | None = None
    ) -> Path:
        """Write the Python package ``<path>/<name>/`` computing the mean; return its folder.

        See :func:`tinyprop.export.ensemble.export_ensemble_python`.
        """
        return export_ensemble_python(self.members, path, name=name, metadata=metadata,
                                      ensemble_fingerprint=self.fingerprint())

    def export_c(
        self,
        path: str | os.PathLike[str],
        *,
        name: str = "ensemble",
        dtype: Any = "float32",
        metadata: Mapping[str, Any] | None = None,
        literals: str = "decimal",
    ) -> tuple[Path, ...]:
        """Write C99 code for the mean into the existing directory ``path``; return the files written.

        See :func:`tinyprop.export.ensemble.export_ensemble_c`.
        """
        return export_ensemble_c(self.members, path, name=name, dtype=dtype, metadata=metadata, literals=literals,
                                 ensemble_fingerprint=self.fingerprint())
