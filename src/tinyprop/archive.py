"""Pickle-free archives of named arrays plus a JSON manifest, written atomically.

An archive is a ZIP file whose members are stored uncompressed:

- ``manifest.json``: a UTF-8 JSON object. Its ``"arrays"`` field, added by
  :func:`write_archive`, lists every array in order as
  ``{"name", "dtype", "shape", "sha256"}``;
- ``<name>.npy`` for each listed array: numpy's ``.npy`` format (version 1.0
  or 2.0), little-endian, C order, never an object array.

This is numpy's ``.npz`` container, so ``numpy.load(path, allow_pickle=False)``
opens it too. ``sha256`` is the SHA-256 of the array's elements as
little-endian bytes in C order (:func:`array_bytes`).

:func:`read_archive` reads the file into memory and trusts nothing in it: the
member list must match the manifest exactly, every ``.npy`` header must match
its manifest entry before any data is read, and every SHA-256 is recomputed.
Any inconsistency raises :class:`ArchiveError` naming the member and field.

:func:`write_archive` builds the whole archive in memory, writes it to a new
temporary file in the target folder, flushes it to disk (``os.fsync``),
renames it over the target (``os.replace``, atomic on POSIX and Windows) and
then syncs the folder where the platform allows it. A failure at any step
removes the temporary file and leaves a previous file at ``path`` untouched.
"""

from __future__ import annotations

import contextlib
import errno
import hashlib
import io
import json
import math
import os
import re
import secrets
import stat
import struct
import zipfile
from collections.abc import Mapping
from typing import Any

import numpy as np

__all__ = [
    "ArchiveError",
    "write_archive",
    "read_archive",
    "write_bytes_atomically",
    "check_json",
    "array_bytes",
    "array_record",
]

MANIFEST_MEMBER = "manifest.json"
ARRAY_DTYPES = {
    name: np.dtype(name).newbyteorder("<")
    for name in ("bool", "int8", "int16", "int32", "int64", "uint8", "uint16", "uint32", "uint64", "float32", "float64")
}
ARRAY_NAME = re.compile(r"(?=.{1,200}\Z)[A-Za-z0-9_][A-Za-z0-9_.\-]*(/[A-Za-z0-9_][A-Za-z0-9_.\-]*)*")
"""Array names: ``/``-separated parts, each starting with a letter, digit or ``_`` (so never ``..``);
1-200 characters."""
MAX_JSON_DEPTH = 64
MAX_MANIFEST_BYTES = 64 * 2**20
_MAX_NPY_HEADER = 10_000  # numpy's own default limit for reading .npy headers
MAX_ARCHIVE_BYTES = 2**31 - 1  # below ZIP64's limits: every size and offset fits the classic ZIP fields
_LOCAL_HEADER = b"PK\x03\x04"
_LOCAL = struct.Struct("<4s5H3L2H")  # signature, version, flags, method, time, date, crc, sizes, name and extra lengths
_END_SIGNATURE = b"PK\x05\x06"
_END_RECORD = struct.Struct("<4s4H2LH")  # signature, disks, entries, central directory size and offset, comment
_RECORD_KEYS = {"name", "dtype", "shape", "sha256"}
_SHA256 = re.compile(r"[0-9a-f]{64}")
_ZIP_TIME = (1980, 1, 1, 0, 0, 0)  # fixed, so equal content gives byte-identical files
# What zipfile, json and numpy's header parser raise on malformed input.
_MALFORMED = (zipfile.BadZipFile, EOFError, ValueError, KeyError, IndexError, OverflowError, RuntimeError)


class ArchiveError(ValueError):
    """An archive cannot be written, or a file is not a valid, intact archive."""


# ---------------------------------------------------------------- writing
def write_archive(path: str | os.PathLike[str], arrays: Mapping[str, np.ndarray], manifest: Mapping[str, Any]) -> None:
    """Write ``arrays`` and ``manifest`` to ``path`` atomically.

    ``arrays`` maps names (:data:`ARRAY_NAME`, e.g. ``"layer0.weight"`` or
    ``"optimizer/m/0"``) to numpy arrays of a dtype in :data:`ARRAY_DTYPES`; they are
    written little-endian in C order, in the mapping's order. ``manifest`` is a
    JSON-compatible dict (see :func:`check_json`) without an ``"arrays"`` key;
    the written manifest is ``manifest`` plus ``"arrays"``. Neither argument is
    modified.
    """
    if not isinstance(manifest, Mapping):
        raise ArchiveError(f"the manifest must be a dict, got {type(manifest).__name__}")
    if "arrays" in manifest:
        raise ArchiveError("the manifest key 'arrays' is reserved: write_archive fills it in")
    check_json(dict(manifest), "manifest")
    if not isinstance(arrays, Mapping):
        raise ArchiveError(f"arrays must be a dict of name to numpy array, got {type(arrays).__name__}")
    stored = {name: _storable(name, array) for name, array in arrays.items()}
    full_manifest = {**manifest, "arrays": [array_record(name, array) for name, array in stored.items()]}
    text = json.dumps(full_manifest, indent=2, ensure_ascii=False, allow_nan=False)
    buffer = io.BytesIO()
    with zipfile.ZipFile(buffer, "w", compression=zipfile.ZIP_STORED) as archive:
        archive.writestr(_member_info(MANIFEST_MEMBER), text.encode("utf-8"))
        for name, array in stored.items():
            npy = io.BytesIO()
            np.lib.format.write_array(npy, array, allow_pickle=False)
            archive.writestr(_member_info(name + ".npy"), npy.getvalue())
    write_bytes_atomically(path, buffer.getvalue())


def write_bytes_atomically(path: str | os.PathLike[str], data: bytes) -> None:
    """Replace the file at ``path`` by ``data`` so that readers see the old file or the new one, never a mix.

    Temporary file ``.<name>.<random>.tmp`` in the same folder (created
    exclusively, with the usual permissions, or those of the file it replaces), written in full and
    ``os.fsync``-ed, then ``os.replace``-d over ``path``; afterwards the folder
    is ``fsync``-ed on POSIX systems that allow it, so the rename itself
    survives a power cut. On any failure, including ``KeyboardInterrupt``, the
    temporary file is removed and the exception propagates. ``OSError`` (a
    missing folder, no permission, a full disk) reaches the caller unchanged.
    """
    target = os.path.abspath(os.fspath(path))
    folder, base = os.path.split(target)
    if not os.path.isdir(folder):
        raise FileNotFoundError(errno.ENOENT, f"cannot write {target}: the folder does not exist", folder)
    temporary = os.path.join(folder, f".{base[:100]}.{secrets.token_hex(8)}.tmp")
    try:
        existing = os.stat(target)
        mode = stat.S_IMODE(existing.st_mode) if stat.S_ISREG(existing.st_mode) else None
    except OSError:
        mode = None
    descriptor = os.open(temporary, os.O_WRONLY | os.O_CREAT | os.O_EXCL | getattr(os, "O_BINARY", 0), 0o666)
    try:
        try:
            if mode is not None and hasattr(os, "fchmod"):
                os.fchmod(descriptor, mode)  # a re-saved file keeps its permissions
            remaining = memoryview(data)
            while remaining:
                remaining = remaining[os.write(descriptor, remaining):]
            os.fsync(descriptor)
        finally:
            os.close(descriptor)
        os.replace(temporary, target)
    except BaseException:
        with contextlib.suppress(OSError):
            os.unlink(temporary)
        raise
    _sync_folder(folder)


def _sync_folder(folder: str) -> None:
    """Make a rename in ``folder`` durable.

    Skipped where folders cannot be opened or synced (Windows, some file systems).
    """
    if os.name != "posix":
        return
    try:
        descriptor = os.open(folder, os.O_RDONLY)
    except OSError:
        return
    try:
        os.fsync(descriptor)
    except OSError:
        pass  # the data is already in place; only the durability of the rename is not guaranteed here
    finally:
        os.close(descriptor)


def _member_info(name: str) -> zipfile.ZipInfo:
    info = zipfile.ZipInfo(name, date_time=_ZIP_TIME)
    info.compress_type = zipfile.ZIP_STORED
    info.external_attr = 0o644 << 16
    return info


def _storable(name: Any, array: Any) -> np.ndarray:
    if not isinstance(name, str) or not ARRAY_NAME.fullmatch(name):
        raise ArchiveError(
            "array names are 1 to 200 characters: '/'-separated parts, each an ASCII letter, digit or '_' "
            f"followed by letters, digits, '_', '.' or '-', got {name!r}"
        )
    if not isinstance(array, np.ndarray):
        raise ArchiveError(f"array {name!r} must be a numpy array, got {type(array).__name__}")
    if array.dtype.name not in ARRAY_DTYPES:
        raise ArchiveError(f"array {name!r} has dtype {array.dtype}; allowed: {', '.join(ARRAY_DTYPES)}")
    return np.asarray(array, dtype=ARRAY_DTYPES[array.dtype.name], order="C")  # keeps 0-d arrays 0-d


def array_bytes(array: np.ndarray) -> bytes:
    """The array's elements as little-endian bytes in C (row-major) order."""
    return np.asarray(array, dtype=array.dtype.newbyteorder("<")).tobytes(order="C")


def array_record(name: str, array: np.ndarray) -> dict[str, Any]:
    """``{"name", "dtype", "shape", "sha256"}`` of an array; the hash is over :func:`array_bytes`."""
    return {
        "name": name,
        "dtype": array.dtype.name,
        "shape": list(array.shape),
        "sha256": hashlib.sha256(array_bytes(array)).hexdigest(),
    }


def check_json(value: Any, where: str, depth: int = 0) -> None:
    """Refuse anything that does not survive a JSON round trip unchanged.

    Allowed: dicts with ``str`` keys, lists, ``str``, ``int`` (``bool``
    included), finite ``float`` and ``None``, nested at most
    :data:`MAX_JSON_DEPTH` levels. Tuples, numpy scalars, NaN and infinity are
    refused because they would come back as something else (or not at all).
    """
    if depth > MAX_JSON_DEPTH:
        raise ArchiveError(f"{where} is nested more than {MAX_JSON_DEPTH} levels deep (or contains itself)")
    if isinstance(value, str):
        _check_text(value, where, "holds")
        return
    if value is None or isinstance(value, (bool, int)):
        return
    if isinstance(value, float):
        if not math.isfinite(value):
            raise ArchiveError(f"{where} is {value}; JSON holds finite numbers only")
        return
    if isinstance(value, dict):
        for key, item in value.items():
            if not isinstance(key, str):
                raise ArchiveError(f"{where} has the key {key!r} of type {type(key).__name__}; JSON keys are strings")
            _check_text(key, where, "has a key with")
            check_json(item, f"{where}[{key!r}]", depth + 1)
        return
    if isinstance(value, list):
        for index, item in enumerate(value):
            check_json(item, f"{where}[{index}]", depth + 1)
        return
    hint = ""
    if isinstance(value, tuple):
        hint = " (use a list)"
    elif isinstance(value, (np.generic, np.ndarray)):
        hint = " (convert it with int(), float() or .tolist())"
    raise ArchiveError(
        f"{where} has type {type(value).__name__}, which JSON cannot hold{hint}; allowed: dict with str keys, "
        "list, str, int, bool, finite float, None"
    )


def _check_text(text: str, where: str, verb: str) -> None:
    try:
        text.encode("utf-8")
    except UnicodeEncodeError as exc:
        raise ArchiveError(
            f"{where} {verb} the character {text[exc.start]!r} at position {exc.start}, which UTF-8 cannot encode "
            "(a lone surrogate); manifests are UTF-8 text"
        ) from None


# ---------------------------------------------------------------- reading
def read_archive(path: str | os.PathLike[str]) -> tuple[dict[str, np.ndarray], dict[str, Any]]:
    """Read and verify an archive; return ``(arrays, manifest)``.

    ``arrays`` maps names to new arrays in manifest order; ``manifest`` is the
    stored manifest without its ``"arrays"`` field. Raises
    :class:`ArchiveError` for any malformed or inconsistent content and
    ``OSError`` if the file cannot be read at all.
    """
    data = _read_file(path)
    try:
        with zipfile.ZipFile(io.BytesIO(data)) as archive:
            _check_layout(data, archive)
            return _read_members(archive)
    except ArchiveError:
        raise
    except _MALFORMED as exc:
        raise ArchiveError(f"the archive is damaged or truncated ({type(exc).__name__}: {exc})") from None


def _read_file(path: str | os.PathLike[str]) -> bytes:
    """The bytes of a regular file that starts with a ZIP signature and holds at most :data:`MAX_ARCHIVE_BYTES`.

    The type, the signature and the size are checked before the file is read,
    so a FIFO or device is refused without blocking or reading, and a large
    file that is not an archive costs a few bytes of memory.
    """
    name = os.fspath(path)
    if not stat.S_ISREG(os.stat(name).st_mode):
        raise ArchiveError(f"not a regular file ({_file_kind(os.stat(name).st_mode)}); an archive is a regular file")
    descriptor = os.open(name, os.O_RDONLY | getattr(os, "O_NONBLOCK", 0) | getattr(os, "O_BINARY", 0))
    with os.fdopen(descriptor, "rb") as handle:
        status = os.fstat(handle.fileno())
        if not stat.S_ISREG(status.st_mode):  # replaced between the two looks
            raise ArchiveError(f"not a regular file ({_file_kind(status.st_mode)}); an archive is a regular file")
        head = handle.read(8)
        if not head.startswith(_LOCAL_HEADER):
            raise ArchiveError(f"not a tinyprop archive: it does not start with a ZIP signature (first bytes {head!r})")
        if status.st_size > MAX_ARCHIVE_BYTES:
            raise ArchiveError(f"the file holds {status.st_size} bytes; archives are limited to {MAX_ARCHIVE_BYTES}")
        handle.seek(max(0, status.st_size - _END_RECORD.size))
        _check_end_record(handle.read(_END_RECORD.size), status.st_size)
        handle.seek(0)
        data = handle.read(MAX_ARCHIVE_BYTES + 1)
    if len(data) > MAX_ARCHIVE_BYTES:
        raise ArchiveError(f"the file holds more than {MAX_ARCHIVE_BYTES} bytes, the limit for archives")
    return data


def _file_kind(mode: int) -> str:
    kinds = ((stat.S_ISDIR, "a folder"), (stat.S_ISFIFO, "a FIFO"), (stat.S_ISCHR, "a character device"),
             (stat.S_ISBLK, "a block device"), (stat.S_ISSOCK, "a socket"))
    return next((text for test, text in kinds if test(mode)), "not a regular file")


def _check_layout(data: bytes, archive: zipfile.ZipFile) -> None:
    """Refuse ZIP files that could be read in more than one way.

    The members must start at byte 0 and follow each other without gaps, each
    local header must agree with its central-directory entry (name, flags,
    method, CRC-32, sizes), the central directory must follow the last member,
    and the end-of-central-directory record (without a comment) must end the
    file. This refuses two archives glued together, data in front of an
    archive and bytes hidden between members or after the end.
    """
    cd_offset = _check_end_record(data[-_END_RECORD.size:], len(data))
    position = 0
    for info in sorted(archive.infolist(), key=lambda i: i.header_offset):
        if info.header_offset != position:
            where = "before the first member" if position == 0 else f"hidden between members, before {info.filename!r}"
            raise ArchiveError(f"the archive is ambiguous: {abs(info.header_offset - position)} bytes {where}")
        fields = _LOCAL.unpack_from(data, position) if position + _LOCAL.size <= len(data) else None
        name_bytes = info.filename.encode("utf-8" if info.flag_bits & 0x800 else "cp437")
        if fields is None or fields[0] != _LOCAL_HEADER or fields[2:4] != (info.flag_bits, info.compress_type) \
                or fields[6:9] != (info.CRC, info.compress_size, info.file_size) \
                or data[position + _LOCAL.size:position + _LOCAL.size + fields[9]] != name_bytes:
            raise ArchiveError(f"the archive is ambiguous: the local header of member {info.filename!r} "
                               "disagrees with the central directory")
        position += _LOCAL.size + fields[9] + fields[10] + info.compress_size
    if position != cd_offset:
        raise ArchiveError(f"the archive is ambiguous: {abs(cd_offset - position)} bytes hidden between the last "
                           "member and the central directory")


def _check_end_record(tail: bytes, size: int) -> int:
    """Check that the file ends with its end-of-central-directory record; return the directory's offset."""
    if len(tail) < _END_RECORD.size or tail[:4] != _END_SIGNATURE:
        raise ArchiveError(
            "the archive is damaged or truncated (the file does not end with the end of the central directory: "
            "bytes follow it, or it is missing)"
        )
    _, disk, cd_disk, n_here, n_total, cd_size, cd_offset, comment = _END_RECORD.unpack(tail)
    end = size - _END_RECORD.size
    if cd_offset + cd_size < end:
        raise ArchiveError(f"the archive is ambiguous: {end - cd_offset - cd_size} bytes before the first member "
                           "(another archive or other data in front of it)")
    if (disk, cd_disk, comment) != (0, 0, 0) or n_here != n_total or cd_offset + cd_size != end:
        raise ArchiveError("the archive is damaged or truncated (its end of the central directory does not "
                           "describe one archive of one part, without a comment, that ends the file)")
    return cd_offset


def _read_members(archive: zipfile.ZipFile) -> tuple[dict[str, np.ndarray], dict[str, Any]]:
    infos = archive.infolist()
    names = [info.filename for info in infos]
    duplicates = sorted({name for name in names if names.count(name) > 1})
    if duplicates:
        raise ArchiveError(f"the archive holds more than one member named {duplicates}")
    for info in infos:
        if info.flag_bits & 0x1:
            raise ArchiveError(f"member {info.filename!r} is encrypted; archive members are stored in the clear")
        if info.compress_type != zipfile.ZIP_STORED:
            raise ArchiveError(
                f"member {info.filename!r} is compressed (ZIP method {info.compress_type}); "
                "archive members are stored uncompressed (method 0)"
            )
    by_name = {info.filename: info for info in infos}
    if MANIFEST_MEMBER not in by_name:
        raise ArchiveError(f"the archive has no {MANIFEST_MEMBER} member (members: {names[:10]})")
    manifest = _read_manifest(archive, by_name[MANIFEST_MEMBER])
    records = _array_records(manifest.pop("arrays", None))
    expected = [MANIFEST_MEMBER] + [record["name"] + ".npy" for record in records]
    unexpected = [name for name in names if name not in expected]
    if unexpected:
        raise ArchiveError(f"unexpected member(s) {unexpected[:10]}, not listed in the manifest")
    missing = [name for name in expected if name not in by_name]
    if missing:
        raise ArchiveError(f"member(s) {missing[:10]} listed in the manifest are missing from the archive")
    arrays = {record["name"]: _read_array(archive, by_name[record["name"] + ".npy"], record) for record in records}
    return arrays, manifest


def _read_manifest(archive: zipfile.ZipFile, info: zipfile.ZipInfo) -> dict[str, Any]:
    if info.file_size > MAX_MANIFEST_BYTES:
        raise ArchiveError(f"{MANIFEST_MEMBER} claims {info.file_size} bytes; the limit is {MAX_MANIFEST_BYTES}")
    raw = archive.read(info)
    try:
        text = raw.decode("utf-8")
        manifest = json.loads(text, object_pairs_hook=_no_duplicate_keys, parse_constant=_no_constants,
                              parse_float=_finite_float)
    except (ValueError, RecursionError) as exc:
        raise ArchiveError(f"{MANIFEST_MEMBER} is not valid UTF-8 JSON: {exc}") from None
    if not isinstance(manifest, dict):
        raise ArchiveError(f"{MANIFEST_MEMBER} must hold a JSON object, found {type(manifest).__name__}")
    return manifest


def _no_duplicate_keys(pairs: list[tuple[str, Any]]) -> dict[str, Any]:
    result = dict(pairs)
    if len(result) != len(pairs):
        keys = [key for key, _ in pairs]
        raise ValueError(f"duplicate key(s) {sorted({k for k in keys if keys.count(k) > 1})}")
    return result


def _finite_float(text: str) -> float:
    value = float(text)
    if not math.isfinite(value):
        raise ValueError(f"{text} is not a finite number (it overflows a float)")
    return value


def _no_constants(name: str) -> None:
    raise ValueError(f"{name} is not a JSON number")


def _array_records(records: Any) -> list[dict[str, Any]]:
    """Validate the manifest's ``"arrays"`` list."""
    if not isinstance(records, list):
        raise ArchiveError(f"manifest field 'arrays' must be a list, found {type(records).__name__}")
    seen: set[str] = set()
    for index, record in enumerate(records):
        where = f"manifest field 'arrays'[{index}]"
        if not isinstance(record, dict) or set(record) != _RECORD_KEYS:
            found = sorted(record) if isinstance(record, dict) else type(record).__name__
            raise ArchiveError(f"{where} must be an object with keys {sorted(_RECORD_KEYS)}, found {found}")
        name, dtype, shape, digest = record["name"], record["dtype"], record["shape"], record["sha256"]
        if not isinstance(name, str) or not ARRAY_NAME.fullmatch(name) or name in seen:
            raise ArchiveError(
                f"{where}: 'name' must be a new array name ('/'-separated letters, digits, '_ . -'), found "
                f"{name!r}"
            )
        seen.add(name)
        if not isinstance(dtype, str) or dtype not in ARRAY_DTYPES:
            raise ArchiveError(f"array {name!r}: dtype {dtype!r} is not allowed; allowed: {', '.join(ARRAY_DTYPES)}")
        if (
            not isinstance(shape, list)
            or len(shape) > 32
            or not all(isinstance(n, int) and not isinstance(n, bool) and 0 <= n < 2**62 for n in shape)
        ):
            raise ArchiveError(
                f"array {name!r}: shape must be a list of at most 32 non-negative integers, found "
                f"{shape!r}"
            )
        if not isinstance(digest, str) or not _SHA256.fullmatch(digest):
            raise ArchiveError(f"array {name!r}: sha256 must be 64 lowercase hex digits, found {digest!r}")
    return records


def _read_array(archive: zipfile.ZipFile, info: zipfile.ZipInfo, record: dict[str, Any]) -> np.ndarray:
    """Check the ``.npy`` header against the manifest before reading the data, then the hash."""
    name, dtype, shape = record["name"], ARRAY_DTYPES[record["dtype"]], tuple(record["shape"])
    n_bytes = math.prod(shape) * dtype.itemsize
    if not n_bytes <= info.file_size <= n_bytes + _MAX_NPY_HEADER + 16:
        raise ArchiveError(
            f"member {info.filename!r} holds {info.file_size} bytes, but a {record['dtype']} array of shape "
            f"{list(shape)} takes {n_bytes} bytes plus a header"
        )
    raw = archive.read(info)
    stream = io.BytesIO(raw)
    version = np.lib.format.read_magic(stream)
    if version == (1, 0):
        header = np.lib.format.read_array_header_1_0(stream, max_header_size=_MAX_NPY_HEADER)
    elif version == (2, 0):
        header = np.lib.format.read_array_header_2_0(stream, max_header_size=_MAX_NPY_HEADER)
    else:
        raise ArchiveError(f"member {info.filename!r} uses .npy format version {version}; 1.0 or 2.0 expected")
    found_shape, fortran_order, found_dtype = header
    if found_dtype.str != dtype.str or found_dtype.names is not None:
        raise ArchiveError(
            f"array {name!r}: the manifest lists dtype {record['dtype']} ({dtype.str}) but the member holds "
            f"dtype {found_dtype} ({found_dtype.str})"
        )
    if tuple(found_shape) != shape:
        raise ArchiveError(
            f"array {name!r}: the manifest lists shape {list(shape)} but the member holds shape {list(found_shape)}"
        )
    if fortran_order:
        raise ArchiveError(f"array {name!r} is stored in Fortran order; C order expected")
    if len(raw) - stream.tell() != n_bytes:
        raise ArchiveError(
            f"array {name!r}: the member holds {len(raw) - stream.tell()} data bytes, {n_bytes} expected"
        )
    array = np.load(io.BytesIO(raw), allow_pickle=False)
    digest = hashlib.sha256(array_bytes(array)).hexdigest()
    if digest != record["sha256"]:
        raise ArchiveError(
            f"array {name!r}: SHA-256 of the stored data is {digest}, the manifest lists {record['sha256']}; "
            "the array was changed or damaged after it was written"
        )
    return array
