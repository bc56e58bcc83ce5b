"""``tinyprop train`` on a class column: the default classification recipe, its metrics and report.

The recipe is :func:`tinyprop.recipes.fit_tabular_classification`; this module
picks the rows (a stratified test split), runs the recipe on the training rows,
measures the classifier (:func:`tinyprop.classmetrics.classification_metrics`)
and writes the model file and the JSON report. ``docs/cli.md`` documents it
and ``tests/test_cli_classes.py`` checks it against the library calls.
"""

from __future__ import annotations

import argparse
import hashlib
import os
import sys
import tempfile
import time
import warnings
from pathlib import Path
from typing import Any

import numpy as np

from .._version import __version__
from ..classify import Classifier, encode_labels, stratified_split
from ..classmetrics import ClassificationMetrics, classification_metrics
from ..csvdata import CsvError, CsvTable
from ..csvlabels import is_text_column, label_cells
from ..envelope import Envelope
from ..export import ErrorBoundWarning, export_c_fixed_point
from ..export.classes import fixed_point_class_agreement
from ..modelfile import save
from ..plots import PLOT_HINT, PlotsUnavailable, confusion_plot, reliability_diagram
from ..recipes import (
    CLASSIFICATION_EPOCHS,
    CLASSIFICATION_HIDDEN_UNITS,
    EVIDENCE_START,
    FitSettings,
    fit_tabular_classification,
)
from ._common import SAFETY, USAGE, CommandError, describe_os_error, numeric_columns, write_json
from ._fit_report import architecture, training_envelope

# options of tinyprop train that belong to the regression recipe: refused with a class target
_REGRESSION_ONLY = ("activation", "method", "optimizer", "lr", "schedule", "momentum", "batch_size",
                    "patience", "max_evaluations", "dtype", "validation_fraction")


def class_targets(table: CsvTable, targets: list[str], marked: list[str] | None) -> list[str]:
    """The targets that are class columns: those named by ``--classes`` and those holding only text."""
    marked = marked or []
    strays = [name for name in marked if name not in targets]
    if strays:
        verb = "is" if len(strays) == 1 else "are"
        raise CommandError(f"--classes names {', '.join(map(repr, strays))}, which {verb} not among --targets", USAGE)
    found = []
    for name in targets:
        if name in marked or is_text_column([cells[0] for _, cells in table.cells([name])]):
            found.append(name)
    return found


def check_options(args: argparse.Namespace, targets: list[str], classes: list[str]) -> None:
    """Refuse what the classification recipe cannot do, naming the option."""
    if len(targets) != 1:
        raise CommandError(f"a class target ({', '.join(map(repr, classes))}) must be the only target; "
                           f"--targets names {len(targets)} columns (fit one model per class column)", USAGE)
    defaults = FitSettings()
    for option in _REGRESSION_ONLY:
        given = getattr(args, option)
        if given is not None and given != getattr(defaults, option, None):
            flag = "--learning-rate" if option == "lr" else "--" + option.replace("_", "-")
            raise CommandError(f"{flag} applies to regression targets; {targets[0]!r} is a "
                               "class target, fitted by the classification recipe (see docs/classification.md)", USAGE)


def parse_class_weights(text: str | None, labels: tuple[str, ...]) -> Any:
    """``None``, ``"balanced"`` or ``{label: weight}`` from ``--class-weights``."""
    if text is None or text == "balanced":
        return text
    weights: dict[str, float] = {}
    for part in text.split(","):
        label, sep, value = part.rpartition("=")
        try:
            number = float(value)
        except ValueError:
            number = float("nan")
        if not sep or not label.strip() or not np.isfinite(number) or number <= 0:
            raise CommandError(f"--class-weights: expected 'balanced' or LABEL=WEIGHT pairs with weights > 0, "
                               f"comma-separated, got {part!r}", USAGE)
        if label.strip() not in labels:
            raise CommandError(f"--class-weights: {label.strip()!r} is not a label of the class column; the labels "
                               f"are {', '.join(map(repr, labels))}", USAGE)
        weights[label.strip()] = number
    return weights


def run(args: argparse.Namespace, table: CsvTable, target: str, inputs: list[str], model_path: Path,
        report_path: Path, plots: Path | None, read_seconds: float) -> int:
    """Fit, measure, save and report a classifier for the class column ``target``."""
    started = time.perf_counter()
    X, _ = numeric_columns(table, inputs, [])
    try:
        labels = label_cells([cells[0] for _, cells in table.cells([target])], table.line_number, target, table.path)
    except CsvError as exc:
        raise CommandError(str(exc)) from None
    classes, indices = encode_labels(labels)
    read_seconds += time.perf_counter() - started
    weights = parse_class_weights(args.class_weights, classes)
    hidden = tuple(args.hidden) if args.hidden is not None else (CLASSIFICATION_HIDDEN_UNITS,)
    epochs = args.epochs if args.epochs is not None else CLASSIFICATION_EPOCHS
    training, test = _split(indices, args.test_fraction, args.seed, classes)
    counts = {label: int(n) for label, n in zip(classes, np.bincount(indices, minlength=len(classes)))}
    print(f"data: {args.data}: {X.shape[0]} rows; inputs {', '.join(inputs)}; class target {target} "
          f"({len(classes)} classes: {', '.join(f'{k} {n}' for k, n in counts.items())})")
    print(f"split (seed {args.seed}, stratified): {training.size} training, {test.size} test rows")
    print(f"fitting: classification recipe, hidden {','.join(map(str, hidden))}, {epochs} epochs, L2 penalty "
          f"by the evidence framework{'' if weights is None else ', class weights ' + args.class_weights}", flush=True)
    started = time.perf_counter()
    try:
        fitted = fit_tabular_classification(X[training], labels[training], hidden=hidden, epochs=epochs,
                                            class_weights=weights, seed=args.seed, target=target)
    except (ValueError, ArithmeticError) as exc:
        raise CommandError(f"fitting failed: {exc}") from None
    fit_seconds = time.perf_counter() - started
    classifier = fitted.classifier
    if classifier.labels != classes:  # a class with no training row: the model would not know it
        missing = sorted(set(classes) - set(classifier.labels))
        raise CommandError(f"no training row has the label {', '.join(map(repr, missing))}; lower --test-fraction")
    net = classifier.net
    last = fitted.evidence[-1]
    print(f"network: {architecture(net)}; {net.n_params} parameters; L2 penalty {fitted.penalty:.3g} after "
          f"{len(fitted.evidence)} evidence round{'s' * (len(fitted.evidence) > 1)} ({last[1]:.1f} well-determined "
          f"weights) ({fit_seconds:.1f} s)")
    started = time.perf_counter()
    metrics = {part: _measure(classifier, X, indices, rows) for part, rows in (("training", training), ("test", test))}
    evaluate_seconds = time.perf_counter() - started
    for part, measured in metrics.items():
        if measured is not None:
            print(f"{part}: {measured.summary()}")
    shown = metrics["test"] or metrics["training"]
    assert shown is not None
    print("\n".join(str(shown).splitlines()[1:]))
    stored_envelope = training_envelope(X[training], inputs, args.envelope_margin)
    integer = _integer_code_agreement(net, stored_envelope, X[test if test.size else training])
    print(f"integer-only C (formats from the training envelope, as 'tinyprop export' writes it), on the "
          f"{'test' if test.size else 'training'} rows: "
          f"{integer['agreement'] if 'agreement' in integer else integer['unavailable']}")
    envelope = stored_envelope.to_metadata()
    metadata = {
        "description": f"classifier of {target} fitted by tinyprop train to {Path(args.data).name}",
        "inputs": [{"name": name} for name in inputs],
        "outputs": _output_names(classifier),
        **classifier.metadata(),
        **envelope,
        "training": {"settings": _settings(args, hidden, epochs, weights, classifier), "data": _source(args.data)},
    }
    started = time.perf_counter()
    try:
        digest = save(net, model_path, metadata=metadata)
    except OSError as exc:
        raise CommandError(f"cannot write the model file: {describe_os_error(exc)}") from None
    save_seconds = time.perf_counter() - started
    document = {
        "report": "tinyprop training report",
        "tinyprop_version": __version__,
        "command": "train",
        "created_utc": time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime()),
        "data": {**_source(args.data), "rows": int(X.shape[0]), "inputs": list(inputs), "targets": [target],
                 "classes": list(classes), "class_counts": counts,
                 "split": {"training": int(training.size), "validation": 0, "test": int(test.size)}},
        "settings": _settings(args, hidden, epochs, weights, classifier),
        "network": {"fingerprint": digest, "n_params": net.n_params, "dtype": net.dtype.name,
                    "architecture": architecture(net)},
        "fit": {"method": "classification recipe", "penalty": fitted.penalty,
                "evidence_rounds": [{"l2": l2, "well_determined_weights": gamma, "sum_squared_weights": squares}
                                    for l2, gamma, squares in fitted.evidence],
                "class_weights": dict(zip(classes, fitted.class_weights)), "message": fitted.result.message,
                "epochs_run": fitted.result.epochs_run},
        "history": {"training_loss": [float(v) for v in fitted.result.history.training], "validation_loss": None},
        "metrics": {part: None if m is None else m.to_dict() for part, m in metrics.items()},
        "integer_code": integer,
        "timings_s": {"read": read_seconds, "fit": fit_seconds, "evaluate": evaluate_seconds, "save": save_seconds},
        **envelope,
        "model_file": os.fspath(model_path),
        "safety": SAFETY,
    }
    write_json(report_path, document)
    print(f"wrote {model_path} (fingerprint {digest})")
    print(f"wrote {report_path}")
    if plots is not None:
        _plots(plots, shown, Path(args.data).name, "test rows" if metrics["test"] is not None else "training rows")
    return 0


def _integer_code_agreement(net: Any, envelope: Envelope, rows: np.ndarray) -> dict[str, Any]:
    """How the integer-only C code (formats proven over ``envelope``) decides on ``rows`` against the float64 network.

    The same code ``tinyprop export --language c-fixed`` writes from the envelope stored in the model.
    """
    try:
        with tempfile.TemporaryDirectory() as folder, warnings.catch_warnings():
            warnings.simplefilter("ignore", ErrorBoundWarning)  # the proof's outcome is reported below
            report = export_c_fixed_point(net, folder, name="model_q", envelope=envelope)
    except (TypeError, ValueError) as exc:  # e.g. weights no int16 format holds
        return {"unavailable": f"not available ({exc})"}
    agreement = fixed_point_class_agreement(report, net, rows)
    text = str(agreement) + ("" if report.saturation_free else "; saturation inside the envelope NOT proven")
    return {"formats": "training envelope", "saturation_free": bool(report.saturation_free),
            **agreement.to_dict(), "agreement": text}


def _split(indices: np.ndarray, fraction: float, seed: int, classes: tuple[str, ...]) -> tuple[np.ndarray, np.ndarray]:
    training, test = stratified_split(indices, fraction, seed)
    if training.size < 2:
        raise CommandError(f"only {training.size} training rows are left; lower --test-fraction", USAGE)
    return training, test


def _measure(
    classifier: Classifier, X: np.ndarray, indices: np.ndarray, rows: np.ndarray
) -> ClassificationMetrics | None:
    if rows.size == 0:
        return None
    return classification_metrics(indices[rows], classifier.probabilities(X[rows]), classifier.labels)


def _output_names(classifier: Classifier) -> list[dict[str, str]]:
    """The network outputs' names for the model file: one logit per class, or the log-odds of the second label."""
    if classifier.decision == "sigmoid":
        return [{"name": f"log-odds of {classifier.labels[1]}"}]
    return [{"name": f"logit of {label}"} for label in classifier.labels]


def _settings(args: argparse.Namespace, hidden: tuple[int, ...], epochs: int, weights: Any,
              classifier: Classifier) -> dict[str, Any]:
    loss = "CrossEntropyOnSigmoid" if classifier.decision == "sigmoid" else "CrossEntropyOnSoftmax"
    return {"recipe": "fit_tabular_classification", "hidden": list(hidden), "epochs": epochs, "seed": args.seed,
            "test_fraction": args.test_fraction, "class_weights": weights, "penalty": "evidence",
            "evidence_start": EVIDENCE_START, "loss": loss}


def _source(path: str) -> dict[str, Any]:
    with open(path, "rb") as handle:
        return {"path": os.fspath(path), "sha256": hashlib.sha256(handle.read()).hexdigest()}


def _plots(folder: Path, metrics: ClassificationMetrics, title: str, rows: str) -> None:
    try:
        for path in (confusion_plot(metrics, folder / "confusion.png", title=f"{title}: {rows}"),
                     reliability_diagram(metrics, folder / "reliability.png", title=f"{title}: {rows}")):
            print(f"wrote {path}")
    except PlotsUnavailable:
        print(f"plots skipped: matplotlib is not installed (to enable plots: {PLOT_HINT})", file=sys.stderr)
