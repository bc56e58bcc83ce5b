"""Optional plots: valid PNG files with matplotlib; without it, a clear message and commands that still work."""

from __future__ import annotations

import sys

import numpy as np
import pytest

from test_cli import write_synthetic_csv
from tinyprop.cli import main
from tinyprop.plots import PLOT_HINT, PlotsUnavailable, learning_curves, parity_plot

PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"  # the PNG specification (ISO/IEC 15948), section 5.2
NON_TRIVIAL = 5_000  # bytes; a blank 640x420 PNG compresses to far less than a plot with axes, text and lines


def assert_png(path) -> None:
    data = path.read_bytes()
    assert data[:8] == PNG_SIGNATURE, path
    assert data[12:16] == b"IHDR"  # the first chunk of every PNG
    assert len(data) > NON_TRIVIAL, (path, len(data))


@pytest.fixture
def without_matplotlib(monkeypatch):
    """Make every ``import matplotlib...`` fail, as on a machine without the ``plot`` extra."""
    for name in [name for name in sys.modules if name == "matplotlib" or name.startswith("matplotlib.")]:
        monkeypatch.setitem(sys.modules, name, None)
    monkeypatch.setitem(sys.modules, "matplotlib", None)


def test_learning_curves_and_parity_plot_are_valid_pngs(tmp_path):
    pytest.importorskip("matplotlib")
    epochs = np.arange(1, 41)
    training = 1.0 / epochs  # synthetic falling losses
    curves = learning_curves(training, 1.2 / epochs, tmp_path / "curves.png")
    rng = np.random.default_rng(0)
    actual = rng.uniform(0, 1, (50, 2))
    parity = parity_plot(actual, actual + rng.normal(0, 0.02, actual.shape), tmp_path / "parity.png", names=["a", "b"])
    assert_png(curves)
    assert_png(parity)


def test_plot_inputs_are_checked(tmp_path):
    with pytest.raises(ValueError, match="positive and finite"):
        learning_curves([1.0, 0.0], None, tmp_path / "x.png")
    with pytest.raises(ValueError, match="one loss per epoch"):
        learning_curves([1.0, 0.5], [1.0], tmp_path / "x.png")
    with pytest.raises(ValueError, match="same shape"):
        parity_plot(np.zeros(3), np.zeros(4), tmp_path / "x.png")


def test_train_writes_both_plots(tmp_path, capsys):
    pytest.importorskip("matplotlib")
    write_synthetic_csv(tmp_path / "data.csv", n=60)
    status = main(["train", str(tmp_path / "data.csv"), "--inputs", "x0,x1,x2", "--targets", "y1,y2",
                   "--hidden", "4", "--method", "mini-batch", "--epochs", "15", "--quiet",
                   "--out", str(tmp_path / "m.npz"),
                   "--plots", str(tmp_path / "plots")])
    assert status == 0, capsys.readouterr().err
    assert_png(tmp_path / "plots" / "learning_curves.png")
    assert_png(tmp_path / "plots" / "parity.png")


def test_without_matplotlib_the_functions_say_how_to_enable_plots(without_matplotlib, tmp_path):
    with pytest.raises(PlotsUnavailable, match="matplotlib") as raised:
        learning_curves([1.0, 0.5], None, tmp_path / "x.png")
    assert PLOT_HINT in str(raised.value) and isinstance(raised.value, ImportError)
    assert not (tmp_path / "x.png").exists()


def test_without_matplotlib_train_still_works_and_says_how_to_enable_plots(without_matplotlib, tmp_path, capsys):
    write_synthetic_csv(tmp_path / "data.csv", n=60)
    status = main(["train", str(tmp_path / "data.csv"), "--inputs", "x0,x1,x2", "--targets", "y1",
                   "--hidden", "3", "--method", "mini-batch", "--epochs", "5", "--quiet",
                   "--out", str(tmp_path / "m.npz"),
                   "--plots", str(tmp_path / "plots")])
    out, err = capsys.readouterr()
    assert status == 0
    assert (tmp_path / "m.npz").is_file() and (tmp_path / "m.report.json").is_file()
    assert list((tmp_path / "plots").iterdir()) == []
    assert "matplotlib is not installed" in err and 'pip install "tinyprop[plot]"' in err
