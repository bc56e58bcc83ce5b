"""The CSV reader: number spellings, every bad cell in one error, one read, memory. Synthetic files only."""

from __future__ import annotations

import hashlib
import os
import tracemalloc

import numpy as np
import pytest

from tinyprop.csvdata import CsvError, read_csv


def _write(tmp_path, text, name="d.csv"):
    path = tmp_path / name
    path.write_text(text, encoding="utf-8")
    return path


# ------------------------------------------------------------------ item 19: decimal numbers only
@pytest.mark.parametrize("cell", ["1_0", "1__0", "\u0661\u0662", "0x10", "1,5", "--1", "1e", "nan", "inf", "-Infinity"])
def test_python_only_and_non_finite_spellings_are_refused(tmp_path, cell):
    path = _write(tmp_path, f'x;y\n"{cell}";2\n')
    with pytest.raises(CsvError, match=r"line 2, column 'x': .* is not a (finite )?number"):
        read_csv(path, delimiter=";").numeric(["x"])


@pytest.mark.parametrize("cell,value", [("-12", -12.0), ("3.5", 3.5), (".5", 0.5), ("5.", 5.0), ("1e-3", 1e-3),
                                        ("2.5E+04", 2.5e4), (" +7 ", 7.0), ("1e308", 1e308)])
def test_decimal_numbers_as_spreadsheets_write_them_are_read(tmp_path, cell, value):
    path = _write(tmp_path, f"x,y\n{cell},2\n")
    assert read_csv(path).numeric(["x", "y"]).tolist() == [[value, 2.0]]


# ------------------------------------------------------------------ issue 15 item 1: every bad cell in one run
def test_every_bad_cell_is_reported_at_once(tmp_path):
    lines = ["a,b,y"] + [f"{i},{i},{i}" for i in range(200)]
    lines[102] = "1,,3"
    lines[150] = "1,n/a,3"
    lines[180] = "inf,2,3"
    path = _write(tmp_path, "\n".join(lines) + "\n")
    with pytest.raises(CsvError) as caught:
        read_csv(path).numeric(["a", "b", "y"])
    message = str(caught.value)
    summary = "3 cells are not usable numbers (every used cell must hold a finite number):"
    assert message.splitlines()[0].endswith(summary)
    assert "line 103, column 'b': the cell is empty" in message
    assert "line 151, column 'b': 'n/a' is not a number" in message
    assert "line 181, column 'a': 'inf' is not a finite number" in message
    assert [p.line for p in caught.value.problems] == [103, 151, 181] and caught.value.more == 0


def test_many_bad_cells_are_described_up_to_a_limit_and_the_rest_counted(tmp_path):
    names = [f"c{k}" for k in range(10)]
    rows = [",".join(names)] + [",".join("x" if i in (k, k + 10) else "1" for k in range(10)) for i in range(30)]
    path = _write(tmp_path, "\n".join(rows) + "\n")  # every column has 2 bad cells: 20 in all
    with pytest.raises(CsvError) as caught:
        read_csv(path).numeric(names, max_problems=5)
    message = str(caught.value)
    assert "20 cells are not usable numbers" in message
    assert message.count("is not a number") == 5 and message.endswith("... and 15 more")
    assert caught.value.counts == dict.fromkeys(names, 2)


def test_a_column_full_of_text_is_summarised_in_one_line(tmp_path):
    lines = ["t,y"] + [f"2024-01-{i % 28 + 1:02d},{i}" for i in range(100)]
    path = _write(tmp_path, "\n".join(lines) + "\n")
    with pytest.raises(CsvError) as caught:
        read_csv(path).numeric(["t", "y"])
    expected = "  column 't': 100 cells, the first on line 2: '2024-01-01' is not a number"
    assert str(caught.value).splitlines()[1:] == [expected]


def test_a_single_bad_cell_keeps_the_one_line_message(tmp_path):
    path = _write(tmp_path, "x,y\n1,2\n3,abc\n")
    with pytest.raises(CsvError, match=r"^.*d\.csv, line 3, column 'y': 'abc' is not a number$"):
        read_csv(path).numeric(["x", "y"])


# ------------------------------------------------------------------ reading once; the digest of what was parsed
def test_the_digest_is_of_the_bytes_parsed(tmp_path):
    text = "\ufeff# synthetic\nx,y\r\n1,2\r\n\n3,4\r\n"
    path = _write(tmp_path, text)
    table = read_csv(path)
    assert table.sha256 == hashlib.sha256(text.encode("utf-8")).hexdigest()
    assert table.numeric(["y", "x"]).tolist() == [[2.0, 1.0], [4.0, 3.0]]
    assert [table.line_number(i) for i in range(len(table))] == [3, 5]


@pytest.mark.skipif(not hasattr(os, "mkfifo"), reason="needs a FIFO (POSIX)")
def test_a_pipe_is_read_once(tmp_path):
    import threading

    fifo = tmp_path / "pipe.csv"
    os.mkfifo(fifo)
    text = "x,y\n" + "".join(f"{i},{2 * i}\n" for i in range(50_000))  # more than one pipe buffer
    writer = threading.Thread(target=lambda: fifo.write_text(text), daemon=True)
    writer.start()
    table = read_csv(fifo)
    writer.join(timeout=10)
    assert table.sha256 == hashlib.sha256(text.encode()).hexdigest() and len(table) == 50_000


def test_text_label_columns_can_be_taken_from_the_splitting_layer(tmp_path):
    # the separation another conversion builds on: cells() gives the text, numeric() is one consumer of it
    path = _write(tmp_path, 'when,kind,y\n2024-01-01,"pump, small",1\n2024-01-02,valve,2\n')
    table = read_csv(path)
    assert [cells for _, cells in table.cells(["kind", "when"])] == [("pump, small", "2024-01-01"),
                                                                   ("valve", "2024-01-02")]


# ------------------------------------------------------------------ item 13: peak memory below 3x the file size
def _synthetic_csv(path, size):
    rng = np.random.default_rng(0)
    block = "".join(f"{a:.6f},{b:.6f},{c:.6f},{d:.6f}\n" for a, b, c, d in rng.normal(size=(1000, 4)))
    with open(path, "w", encoding="utf-8") as handle:
        handle.write("w,x,y,z\n")
        handle.write(block * max(1, size // len(block)))
    return os.path.getsize(path)


def _peak_ratio(path, size):
    tracemalloc.start()
    try:
        table = read_csv(path)
        values = table.numeric(list(table.columns))
        _, peak = tracemalloc.get_traced_memory()
    finally:
        tracemalloc.stop()
    assert values.shape == (len(table), 4)
    return peak / size


def test_an_unnamed_first_column_is_row_labels_and_left_out_of_the_columns(tmp_path):
    """R's write.csv header (an empty first cell over row names; synthetic rows): the columns are the named ones,
    the cells come from the right fields, subsets and renaming keep it so."""
    path = tmp_path / "r.csv"
    path.write_text('"","a","b"\n"1",0.5,x\n"2",1.5,y\n')
    table = read_csv(path)
    assert table.columns == ("a", "b") and table.row_labels
    assert table.numeric(["a"]).tolist() == [[0.5], [1.5]]
    assert [cells for _, cells in table.cells(["b", "a"])] == [("x", "0.5"), ("y", "1.5")]
    assert [cells for _, cells in table.subset([1]).renamed(["p", "q"]).cells(["q"])] == [("y",)]
    plain = tmp_path / "plain.csv"
    plain.write_text("a,b\n1,2\n")
    assert not read_csv(plain).row_labels
    for header, what in (("a,,b", "header field 2 is empty"), (",a, ", "header fields 1 and 3 are empty"),
                         (",", "header fields 1 and 2 are empty")):
        path.write_text(header + "\n" + ",".join("1" * len(header.split(","))) + "\n")
        with pytest.raises(CsvError, match=what + "; every column needs a name, except that the first may be"):
            read_csv(path)


def test_reading_peaks_below_three_times_the_file_size(tmp_path):
    size = _synthetic_csv(tmp_path / "m.csv", 1 << 20)
    ratio = _peak_ratio(tmp_path / "m.csv", size)
    print(f"CSV read + numeric: peak {ratio:.2f} x the file size ({size} bytes)")
    assert ratio < 3.0


@pytest.mark.slow
def test_reading_a_20_mb_file_peaks_below_three_times_its_size(tmp_path):
    size = _synthetic_csv(tmp_path / "m.csv", 20 << 20)
    ratio = _peak_ratio(tmp_path / "m.csv", size)
    print(f"CSV read + numeric: peak {ratio:.2f} x the file size ({size} bytes)")
    assert ratio < 3.0
