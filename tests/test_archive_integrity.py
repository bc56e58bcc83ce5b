"""Archive integrity: ambiguous ZIP layouts, non-regular files, kept file modes, manifest numbers, encodings.

Synthetic networks only.
"""

from __future__ import annotations

import os
import stat
import subprocess
import sys
import textwrap
import threading
import zipfile

import pytest

import tinyprop as tp
from tinyprop.modelfile import ModelFileError


def _saved(tmp_path, name, seed):
    path = tmp_path / name
    tp.save(tp.build_mlp([2, 3, 1], seed=seed), path)
    return path


# ------------------------------------------------------------------ item 6: ambiguous archives
def test_two_archives_concatenated_are_refused(tmp_path):
    a, b = _saved(tmp_path, "a.npz", 0), _saved(tmp_path, "b.npz", 1)
    both = tmp_path / "both.npz"
    both.write_bytes(a.read_bytes() + b.read_bytes())
    with pytest.raises(ModelFileError, match="bytes before the first member"):
        tp.load(both)


def test_junk_after_a_local_header_signature_is_refused(tmp_path):
    a = _saved(tmp_path, "a.npz", 0)
    crafted = tmp_path / "crafted.npz"
    crafted.write_bytes(b"PK\x03\x04" + b"junk" * 10 + a.read_bytes())
    with pytest.raises(ModelFileError, match="bytes before the first member"):
        tp.load(crafted)


def test_bytes_after_the_end_of_the_central_directory_are_refused(tmp_path):
    a = _saved(tmp_path, "a.npz", 0)
    crafted = tmp_path / "crafted.npz"
    crafted.write_bytes(a.read_bytes() + b"trailing")
    with pytest.raises(ModelFileError, match="end of the central directory"):
        tp.load(crafted)


def test_a_local_header_that_disagrees_with_the_central_directory_is_refused(tmp_path):
    a = _saved(tmp_path, "a.npz", 0)
    data = bytearray(a.read_bytes())
    # the local header of the first member (the manifest) carries its CRC-32 at offset 14
    data[14] ^= 0xFF
    crafted = tmp_path / "crafted.npz"
    crafted.write_bytes(bytes(data))
    with pytest.raises(ModelFileError, match="local header .* disagrees with the central directory"):
        tp.load(crafted)


def test_a_gap_between_members_is_refused(tmp_path):
    a = _saved(tmp_path, "a.npz", 0)
    with zipfile.ZipFile(a) as archive:
        members = [(info, archive.read(info)) for info in archive.infolist()]
    crafted = tmp_path / "crafted.npz"
    with open(crafted, "wb") as handle:
        with zipfile.ZipFile(handle, "w") as out:
            for k, (info, data) in enumerate(members):
                out.writestr(info, data)
                if k == 0:  # zipfile writes the next member at start_dir: leave a gap holding other bytes
                    handle.seek(out.start_dir)
                    handle.write(b"hidden bytes between members")
                    out.start_dir = handle.tell()
    assert b"hidden bytes" in crafted.read_bytes()
    with pytest.raises(ModelFileError, match="28 bytes hidden between members"):
        tp.load(crafted)


# ------------------------------------------------------------------ item 12: non-regular and huge files
@pytest.mark.skipif(not hasattr(os, "mkfifo"), reason="needs FIFOs (POSIX)")
def test_a_fifo_is_refused_without_blocking(tmp_path):
    fifo = tmp_path / "pipe.npz"
    os.mkfifo(fifo)
    outcome = {}

    def attempt():
        try:
            tp.load(fifo)
        except Exception as exc:  # noqa: BLE001 - the outcome is inspected below
            outcome["error"] = exc

    worker = threading.Thread(target=attempt, daemon=True)
    worker.start()
    worker.join(timeout=20)
    if worker.is_alive():  # unblock the reader so the test process can finish
        with open(fifo, "wb"):
            pass
        pytest.fail("load blocked on a FIFO")
    assert isinstance(outcome.get("error"), ModelFileError)
    assert "not a regular file" in str(outcome["error"])


@pytest.mark.skipif(not os.path.exists("/dev/zero"), reason="needs /dev/zero")
def test_dev_zero_is_refused():
    with pytest.raises(ModelFileError, match="not a regular file"):
        tp.load("/dev/zero")


_MEASURE = textwrap.dedent("""
    import resource, sys, time
    import tinyprop as tp
    path = sys.argv[1]
    before = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
    started = time.perf_counter()
    try:
        tp.load(path)
        outcome = "loaded"
    except ValueError as exc:
        outcome = type(exc).__name__ + ": " + str(exc)
    seconds = time.perf_counter() - started
    extra_kib = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss - before
    print(extra_kib, seconds, outcome, sep="\\n")
""")


@pytest.mark.skipif(sys.platform == "win32", reason="resource module and sparse files: POSIX")
@pytest.mark.parametrize("start", [b"text file, not a model\n", b"PK\x03\x04"])
def test_a_200_mb_non_model_file_is_refused_with_little_memory(tmp_path, start):
    path = tmp_path / "big.npz"
    with open(path, "wb") as handle:  # sparse: costs no disk space and no time
        handle.write(start)
        handle.truncate(200 * 2**20)
    done = subprocess.run([sys.executable, "-c", _MEASURE, str(path)], capture_output=True, text=True, check=True)
    extra_kib, seconds, outcome = done.stdout.strip().split("\n", 2)
    print(f"refused 200 MB file starting {start!r} in {float(seconds):.3f} s, "
          f"peak memory +{int(extra_kib) / 1024:.1f} MiB")
    assert outcome.startswith("ModelFileError")
    assert int(extra_kib) < 50 * 1024


# ------------------------------------------------------------------ item 7: file mode kept on re-save
@pytest.mark.skipif(os.name != "posix", reason="POSIX file modes")
def test_resaving_keeps_the_existing_file_mode(tmp_path):
    path = _saved(tmp_path, "m.npz", 0)
    os.chmod(path, 0o600)
    tp.save(tp.build_mlp([2, 3, 1], seed=1), path)
    assert stat.S_IMODE(os.stat(path).st_mode) == 0o600


# ------------------------------------------------------------------ item 8: 1e999 in the manifest
def test_an_overflowing_manifest_number_is_refused(tmp_path):
    path = _saved(tmp_path, "m.npz", 0)
    tp.save(tp.load(path), path, metadata={"gain": 12345.5})
    with zipfile.ZipFile(path) as archive:
        members = {info.filename: archive.read(info) for info in archive.infolist()}
    members["manifest.json"] = members["manifest.json"].replace(b"12345.5", b"1e999")
    crafted = tmp_path / "crafted.npz"
    with zipfile.ZipFile(crafted, "w") as archive:
        for name, data in members.items():
            archive.writestr(name, data)
    with pytest.raises(ModelFileError, match="1e999 is not a finite number"):
        tp.load(crafted)


# ------------------------------------------------------------------ item 18: text UTF-8 cannot encode
def test_a_lone_surrogate_in_metadata_is_a_model_file_error_naming_the_key(tmp_path):
    net = tp.build_mlp([2, 3, 1], seed=0)
    metadata = {"note": "\ud800"}
    with pytest.raises(ModelFileError, match=r"metadata\['note'\].*UTF-8"):
        tp.save(net, tmp_path / "m.npz", metadata=metadata)
    with pytest.raises(ModelFileError, match=r"metadata.*key.*UTF-8"):
        tp.save(net, tmp_path / "m.npz", metadata={"\udc80": 1})
    assert metadata == {"note": "\ud800"}
    assert not list(tmp_path.iterdir())
