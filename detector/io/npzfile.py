"""Safe, reproducible ``.npz`` files: the container of model files and patch banks.

Writing
    :func:`save_npz` writes a deterministic zip archive (sorted entry names, fixed entry time
    1980-01-01 00:00:00, deflate, C-ordered arrays in the ``.npy`` format) through
    :func:`detector.io.files.atomic_write`, so a crash never leaves a half-written file at the
    destination. The same arrays always give the same bytes (for one zlib version).

Reading
    :func:`read_npz` opens an archive without ever unpickling: it reads every array's ``.npy`` header
    first and refuses object arrays, sizes that disagree with a spec or with each other, and more
    than ``MAX_ARRAY_BYTES`` of declared data, before any array data is read or memory set aside;
    :func:`check_arrays` validates the arrays against a spec (dtype, number of dimensions, fixed
    sizes and sizes shared between arrays). :func:`load_npz` does both. Every
    problem, whatever the damage to the file, becomes one :class:`detector.errors.InputError` whose
    message names the file: ``numpy.load(path, allow_pickle=False)`` opens the files too.
"""

from __future__ import annotations

import hashlib
import io
import os
import struct
import warnings
import zipfile
import zlib
from dataclasses import dataclass

import numpy as np

from detector.errors import InputError
from detector.io.files import atomic_write, open_regular

__all__ = ["ArraySpec", "header_arrays", "save_npz", "read_npz", "check_arrays", "load_npz", "file_sha256"]

#: Entry time written for every member; the earliest time a zip archive can store.
ZIP_EPOCH = (1980, 1, 1, 0, 0, 0)

#: deflate can shrink data by at most about 1032:1 (zlib technical notes); a larger declared
#: ratio means a damaged or hostile archive, refused before any memory is set aside for it.
_MAX_DEFLATE_RATIO = 1100

_READ_ERRORS = (
    zipfile.BadZipFile,
    zipfile.LargeZipFile,
    zlib.error,
    EOFError,
    OSError,
    ValueError,
    TypeError,
    KeyError,
    IndexError,
    struct.error,
    NotImplementedError,
    RuntimeError,
    OverflowError,
    MemoryError,
    SyntaxError,
    UnicodeError,
)


@dataclass(frozen=True)
class ArraySpec:
    """What one array of an ``.npz`` file must look like.

    Parameters
    ----------
    dtype : str
        A numpy dtype name (``"int32"``, ``"float32"``, ``"uint8"``, ``"bool"``), ``"str"`` for a
        unicode string array of any length, or ``"integer"`` for any integer dtype.
    shape : tuple
        One entry per dimension: an ``int`` (that exact size), a ``str`` (a named size that must be
        the same wherever the name appears in the spec) or ``None`` (any size).
    required : bool, default=True
        Whether the array must be present.

    Examples
    --------
    >>> spec = {"features": ArraySpec("int32", ("F", 4, 5)), "weights": ArraySpec("float32", ("F",))}
    """

    dtype: str
    shape: tuple
    required: bool = True


def _npy_bytes(array: np.ndarray) -> bytes:
    buf = io.BytesIO()
    array = array if array.flags.c_contiguous else array.copy(order="C")  # keeps 0-d arrays 0-d
    np.lib.format.write_array(buf, array, allow_pickle=False)
    return buf.getvalue()


def header_arrays(kind: str, version: int, window) -> dict[str, np.ndarray]:
    """The arrays every file the project writes with :func:`save_npz` starts with: its format
    version, its kind and the window.

    >>> {k: v.tolist() for k, v in header_arrays("model", 3, (24, 24)).items()}
    {'format_version': 3, 'kind': 'model', 'window': [24, 24]}
    """
    return {"format_version": np.array(version, dtype=np.int64), "kind": np.array(kind),
            "window": np.array(window, dtype=np.int32)}


#: An entry larger than this is stored uncompressed when deflate shrinks a sample of it (its
#: first ``_SAMPLE`` bytes) by less than ``_MIN_SAVING``: a bank's patches of real images barely
#: compress (the cross-data benchmark's cups: 6.8 -> 5.8 MB) and deflating them took 0.2 s of
#: every ``harvest``.
_SAMPLE = 1 << 18
_MIN_SAVING = 0.25


def _compression(data: bytes) -> int:
    """``ZIP_DEFLATED``, or ``ZIP_STORED`` for a large entry that deflate would hardly shrink.

    >>> _compression(bytes(1 << 20)) == zipfile.ZIP_DEFLATED         # zeros deflate well
    True
    >>> noise = np.random.default_rng(0).integers(0, 256, 1 << 20, dtype=np.uint8).tobytes()
    >>> _compression(noise) == zipfile.ZIP_STORED
    True
    """
    if len(data) <= _SAMPLE:
        return zipfile.ZIP_DEFLATED
    sample = data[:_SAMPLE]
    saved = 1.0 - len(zlib.compress(sample, 1)) / len(sample)
    return zipfile.ZIP_DEFLATED if saved >= _MIN_SAVING else zipfile.ZIP_STORED


def save_npz(path: str | os.PathLike, arrays: dict[str, np.ndarray]) -> None:
    """Write ``arrays`` to ``path`` as a deterministic ``.npz`` archive, atomically: every entry
    deflated, except a large one that deflate would hardly shrink (stored, :func:`_compression`).

    Parameters
    ----------
    path : str or os.PathLike
        Destination, written exactly as given (no ``.npz`` is appended). An existing file is
        replaced in one step; deciding whether it may be replaced is the caller's business.
    arrays : dict of str to array_like
        Entry names (without ``.npy``) to arrays. Object arrays are refused.

    Raises
    ------
    ValueError
        An array has an object dtype (it could only be stored by pickling).
    InputError
        The destination cannot be written (its folder does not exist, the disk is full, ...).

    Examples
    --------
    >>> import tempfile, os
    >>> p = os.path.join(tempfile.mkdtemp(), "x.npz")
    >>> save_npz(p, {"b": np.arange(3, dtype=np.int32), "a": np.array("text")})
    >>> sorted(np.load(p, allow_pickle=False).files)
    ['a', 'b']
    """
    path = os.fspath(path)
    payload = {}
    for name in sorted(arrays):
        arr = np.asarray(arrays[name])
        if arr.dtype.hasobject:
            raise ValueError(f"array {name!r} has an object dtype; it cannot be stored without pickle")
        payload[name] = _npy_bytes(arr)

    with atomic_write(path) as fh:
        with zipfile.ZipFile(fh, "w", compression=zipfile.ZIP_DEFLATED) as zf:
            for name, data in payload.items():
                info = zipfile.ZipInfo(name + ".npy", date_time=ZIP_EPOCH)
                info.compress_type = _compression(data)
                info.create_system = 3
                info.external_attr = 0o644 << 16
                zf.writestr(info, data, compresslevel=6)


#: The most bytes of array data one model or patch bank file may declare, all arrays together
#: (as stored, uncompressed). The arrays' headers are read and checked against this, and against
#: each other (:class:`ArraySpec`), before any array data is read or any memory set aside for it.
#: A bank of a million 24 x 24 patches holds about 0.6 GB.
MAX_ARRAY_BYTES = 4 * 2**30

#: The most bytes of ``.npy`` header read from an entry (numpy writes headers of a few hundred).
_MAX_HEADER_BYTES = 1 << 16


def _read_header(buf) -> tuple[tuple, bool, np.dtype, int]:
    """Parse the ``.npy`` header at the start of ``buf`` (no data is touched)."""
    head = io.BytesIO(bytes(buf[: _MAX_HEADER_BYTES + 12]))
    version = np.lib.format.read_magic(head)
    # numpy parses the header with ast.literal_eval: damaged text can make Python warn (an invalid
    # escape sequence, say) on stderr; the damage is reported as an InputError instead
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        if version == (1, 0):
            shape, fortran, dtype = np.lib.format.read_array_header_1_0(head)
        elif version == (2, 0):
            shape, fortran, dtype = np.lib.format.read_array_header_2_0(head)
        else:
            raise ValueError(f"unknown .npy version {version}")
    return shape, fortran, dtype, head.tell()


@dataclass(frozen=True)
class _Layout:
    """What an entry's ``.npy`` header declares."""

    shape: tuple
    fortran: bool
    dtype: np.dtype
    offset: int  # header bytes before the data

    @property
    def nbytes(self) -> int:
        count = 1
        for s in self.shape:
            count *= int(s)
        return count * self.dtype.itemsize


def _entry_name(info: zipfile.ZipInfo) -> str:
    return info.filename[:-4]


def _check_entry(info: zipfile.ZipInfo, size_on_disk: int, path: str, kind: str) -> None:
    name = _entry_name(info)
    if info.flag_bits & 0x1:
        raise InputError(f"not a readable {kind} file: entry {name!r} is encrypted", path=path)
    if info.compress_size > size_on_disk or info.file_size > _MAX_DEFLATE_RATIO * info.compress_size + 4096:
        raise InputError(f"damaged {kind} file: entry {name!r} declares an impossible size", path=path)


def _read_layout(zf: zipfile.ZipFile, info: zipfile.ZipInfo, path: str, kind: str) -> _Layout:
    """Read and check an entry's ``.npy`` header only (a few hundred bytes decompressed)."""
    name = _entry_name(info)
    with zf.open(info) as fh:
        prefix = fh.read(min(info.file_size, _MAX_HEADER_BYTES + 12))
    try:
        shape, fortran, dtype, offset = _read_header(prefix)
    except Exception as exc:  # numpy's header parser on untrusted bytes: any failure means damage
        detail = " ".join(str(exc).split())[:80] or type(exc).__name__
        raise InputError(f"damaged {kind} file: array {name!r} has a bad header ({detail})", path=path) from None
    if dtype.hasobject:
        raise InputError(
            f"refused {kind} file: array {name!r} holds Python objects (patchwood never unpickles)",
            path=path,
        )
    if any(int(s) < 0 for s in shape):
        raise InputError(f"damaged {kind} file: array {name!r} has a negative size", path=path)
    layout = _Layout(tuple(int(s) for s in shape), bool(fortran), dtype, offset)
    if dtype.itemsize == 0 or info.file_size - offset != layout.nbytes:
        raise InputError(
            f"damaged {kind} file: array {name!r} has {info.file_size - offset} data bytes for shape "
            f"{tuple(shape)} of {dtype}",
            path=path,
        )
    return layout


def _read_data(zf: zipfile.ZipFile, info: zipfile.ZipInfo, layout: _Layout, path: str, kind: str):
    name = _entry_name(info)
    buf = bytearray(info.file_size)
    with zf.open(info) as fh:
        view = memoryview(buf)
        got = 0
        while got < len(buf):
            n = fh.readinto(view[got:])
            if not n:
                break
            got += n
        if got != len(buf) or fh.read(1):
            raise InputError(f"damaged {kind} file: entry {name!r} is truncated", path=path)
    count = layout.nbytes // layout.dtype.itemsize
    arr = np.frombuffer(buf, dtype=layout.dtype, count=count, offset=layout.offset)
    return arr.reshape(layout.shape, order="F" if layout.fortran else "C")


def read_npz(path: str | os.PathLike, kind: str = "model", spec: dict | None = None,
             max_bytes: int | None = MAX_ARRAY_BYTES, data: bytes | None = None) -> dict[str, np.ndarray]:
    """Read every array of an ``.npz`` archive, never unpickling, checking what the arrays'
    headers declare before any array data is read.

    Parameters
    ----------
    path : str or os.PathLike
        The archive (a regular file: :func:`detector.io.files.open_regular`).
    kind : str, default="model"
        What the file should be ("model", "patch bank"), used in messages.
    spec : dict of str to ArraySpec, optional
        Checked against the headers of the arrays present (dtype, dimensions, fixed sizes and
        sizes shared between arrays, as :func:`check_arrays` does), so that an array declaring a
        size its companions contradict is refused before its data is read. Missing arrays are
        left to :func:`check_arrays`.
    max_bytes : int or None, default=MAX_ARRAY_BYTES
        The most bytes of array data the file may declare, all arrays together.
    data : bytes, optional
        The file's bytes (a model sent to a cluster worker, say), read instead of ``path``, which
        then only names them in messages.

    Returns
    -------
    dict of str to ndarray
        Entry name (without ``.npy``) to a writable array.

    Raises
    ------
    InputError
        Missing file, not a regular file, not a zip archive, truncated or damaged entries, an
        entry that is not an ``.npy`` array, duplicate names, an object array, declared sizes that
        disagree with the spec or exceed ``max_bytes`` (all refused before array data is read).

    Examples
    --------
    >>> import tempfile, os
    >>> p = os.path.join(tempfile.mkdtemp(), "x.npz")
    >>> save_npz(p, {"a": np.eye(2, dtype=np.float32)})
    >>> read_npz(p)["a"].tolist()
    [[1.0, 0.0], [0.0, 1.0]]
    >>> read_npz(p, max_bytes=15)
    Traceback (most recent call last):
    ...
    detector.errors.InputError: ...x.npz: model file declares 16 bytes of arrays, more than the limit of 15
    """
    path = os.fspath(path)
    if data is None:
        if not os.path.exists(path):
            raise InputError(f"no such {kind} file", path=path)
        if os.path.isdir(path):
            raise InputError(f"is a folder, not a {kind} file", path=path)
    try:
        with (open_regular(path) if data is None else io.BytesIO(data)) as fh:
            size = fh.seek(0, io.SEEK_END)
            fh.seek(0)
            if size == 0:
                raise InputError(f"not a {kind} file: the file is empty (0 bytes)", path=path)
            if not zipfile.is_zipfile(fh):
                raise InputError(f"not a {kind} file (not an .npz archive, or truncated)", path=path)
            fh.seek(0)
            with zipfile.ZipFile(fh, "r") as zf:
                entries: dict[str, zipfile.ZipInfo] = {}
                for info in zf.infolist():
                    if not info.filename.endswith(".npy") or len(info.filename) == 4:
                        raise InputError(
                            f"not a {kind} file: unexpected entry {info.filename!r} in the archive", path=path
                        )
                    name = _entry_name(info)
                    if name in entries:
                        raise InputError(f"damaged {kind} file: entry {name!r} appears twice", path=path)
                    _check_entry(info, size, path, kind)
                    entries[name] = info
                layouts = {name: _read_layout(zf, info, path, kind) for name, info in entries.items()}
                total = sum(layout.nbytes for layout in layouts.values())
                if max_bytes is not None and total > max_bytes:
                    raise InputError(f"{kind} file declares {total:,} bytes of arrays, more than "
                                     f"the limit of {max_bytes:,}", path=path)
                if spec:
                    _check_layouts({n: (v.dtype, v.shape) for n, v in layouts.items()}, spec,
                                   path, kind, require=False)
                return {name: _read_data(zf, entries[name], layouts[name], path, kind)
                        for name in entries}
    except InputError:
        raise
    except _READ_ERRORS as exc:
        detail = " ".join(str(exc).split())[:120] or type(exc).__name__
        raise InputError(f"damaged or not a {kind} file ({detail})", path=path) from None


def _dtype_ok(dtype: np.dtype, want: str) -> bool:
    if want == "str":
        return dtype.kind == "U"
    if want == "integer":
        return dtype.kind in "iu"
    want_dt = np.dtype(want)
    return dtype.kind == want_dt.kind and dtype.itemsize == want_dt.itemsize


def _check_layouts(layouts: dict, spec: dict, path, kind: str, require: bool = True) -> dict[str, int]:
    """Check ``{name: (dtype, shape)}`` against ``spec``; returns the named sizes."""
    sizes: dict[str, int] = {}
    where: dict[str, str] = {}
    for name, s in spec.items():
        if name not in layouts:
            if s.required and require:
                raise InputError(f"not a complete {kind} file: array {name!r} is missing", path=path)
            continue
        dtype, shape = layouts[name]
        if not _dtype_ok(dtype, s.dtype):
            raise InputError(
                f"{kind} array {name!r} has dtype {dtype}; expected {s.dtype}", path=path
            )
        if len(shape) != len(s.shape):
            raise InputError(
                f"{kind} array {name!r} has {len(shape)} dimensions; expected {len(s.shape)}", path=path
            )
        for axis, (got, want) in enumerate(zip(shape, s.shape)):
            if want is None:
                continue
            if isinstance(want, int):
                if got != want:
                    raise InputError(
                        f"{kind} array {name!r} has size {got} along axis {axis}; expected {want}",
                        path=path,
                    )
            elif want in sizes:
                if got != sizes[want]:
                    raise InputError(
                        f"{kind} array {name!r} has size {got} along axis {axis}, but array "
                        f"{where[want]!r} says {sizes[want]}",
                        path=path,
                    )
            else:
                sizes[want] = int(got)
                where[want] = name
    return sizes


def check_arrays(
    arrays: dict[str, np.ndarray], spec: dict[str, ArraySpec], path: str | os.PathLike, kind: str = "model"
) -> dict[str, int]:
    """Validate arrays against a spec; convert each to native byte order in place.

    Parameters
    ----------
    arrays : dict of str to ndarray
        As returned by :func:`read_npz` (modified in place: byte order made native).
    spec : dict of str to ArraySpec
        Required and optional arrays.
    path : str or os.PathLike
        The file the arrays came from, for messages.
    kind : str, default="model"
        What the file should be, for messages.

    Returns
    -------
    dict of str to int
        The value of every named size in the spec.

    Raises
    ------
    InputError
        A required array is missing, or an array has the wrong dtype, number of dimensions, size,
        or a size that disagrees with another array's.

    Examples
    --------
    >>> spec = {"a": ArraySpec("int32", ("N", 2)), "b": ArraySpec("float32", ("N",))}
    >>> check_arrays({"a": np.zeros((3, 2), np.int32), "b": np.zeros(3, np.float32)}, spec, "x.npz")
    {'N': 3}
    """
    sizes = _check_layouts({n: (a.dtype, a.shape) for n, a in arrays.items()}, spec, path, kind)
    for name in spec:
        if name in arrays and not arrays[name].dtype.isnative:
            arrays[name] = arrays[name].astype(arrays[name].dtype.newbyteorder("="))
    return sizes


def load_npz(
    path: str | os.PathLike, spec: dict[str, ArraySpec] | None = None, kind: str = "model"
) -> dict[str, np.ndarray]:
    """Open an ``.npz`` file safely and validate it against ``spec``.

    Parameters
    ----------
    path : str or os.PathLike
        The archive.
    spec : dict of str to ArraySpec, optional
        What the arrays must look like (arrays not named in it are returned unchecked); None reads
        without checking shapes (object arrays and damage are still refused).
    kind : str, default="model"
        What the file should be, for messages.

    Returns
    -------
    dict of str to ndarray

    Raises
    ------
    InputError
        See :func:`read_npz` and :func:`check_arrays`.

    Examples
    --------
    >>> import tempfile, os
    >>> p = os.path.join(tempfile.mkdtemp(), "x.npz")
    >>> save_npz(p, {"a": np.zeros((2, 3), np.uint8)})
    >>> load_npz(p, {"a": ArraySpec("uint8", (None, 3))}, kind="patch bank")["a"].shape
    (2, 3)
    """
    arrays = read_npz(path, kind=kind, spec=spec)
    if spec:
        check_arrays(arrays, spec, path, kind=kind)
    return arrays


def file_sha256(path: str | os.PathLike) -> str:
    """Hex SHA-256 of a file's bytes (FIPS 180-4), read in 1 MiB blocks.

    Examples
    --------
    >>> import tempfile, os
    >>> p = os.path.join(tempfile.mkdtemp(), "x")
    >>> _ = open(p, "wb").write(b"abc")
    >>> file_sha256(p)[:16]
    'ba7816bf8f01cfea'
    """
    h = hashlib.sha256()
    try:
        with open_regular(path) as fh:
            for block in iter(lambda: fh.read(1 << 20), b""):
                h.update(block)
    except OSError as exc:
        raise InputError(f"cannot read ({exc.strerror or exc})", path=path) from None
    return h.hexdigest()


#: The libraries whose releases decide a bank's or a model's bytes (resampling, tree growing,
#: compiled arithmetic), by distribution name.
RECORDED_LIBRARIES = ("numpy", "scikit-learn", "scikit-image", "opencv-python-headless", "numba")


def library_versions() -> dict[str, str]:
    """Installed versions of the libraries that decide a bank's or model's bytes, and patchwood's,
    for the files' metadata. Byte-identical retraining holds within one set of these versions
    (the lock file's); another release of opencv, for one, may resample a few pixels differently.

    >>> import importlib.metadata as md
    >>> library_versions()["opencv-python-headless"] == md.version("opencv-python-headless")
    True
    """
    import importlib.metadata as md

    import detector

    found = {}
    for name in RECORDED_LIBRARIES:
        try:
            found[name] = md.version(name)
        except md.PackageNotFoundError:  # e.g. another OpenCV build installed under its own name
            found[name] = "not installed"
    found["patchwood"] = detector.__version__
    return found

