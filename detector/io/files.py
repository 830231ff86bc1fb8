"""Files the project reads and writes: regular files only, bounded reads, one atomic writer, output
locks, and the one way a file name that is not UTF-8 is written.

Reading
    :func:`open_regular` and :func:`read_bytes` open a path only when it is (or a symbolic link
    leads to) a *regular* file. A named pipe would block the reader forever, a device such as
    ``/dev/zero`` never ends, a socket or a folder cannot be read as a file: they are refused
    with :class:`NotRegularFileError` before a byte is read. A read is bounded: given ``max_bytes``,
    a file that is larger (by its size, or by what a read returns: at most ``max_bytes + 1`` bytes
    are read) is refused with :class:`FileTooLargeError`. Both are :class:`OSError` subclasses
    whose ``strerror`` says what is wrong in a few words, so the readers' ``except OSError`` turns
    them into their one-line :class:`~detector.errors.InputError`.

Writing
    :func:`atomic_write` is the one writer of every file the project writes (reports, pictures,
    JSON, CSV, patch banks, models, tuning output): the content goes to a temporary file in the
    destination's folder (``.NAME.PID-RANDOM.part``), is flushed and synced to the disk, and is
    renamed over the destination in one step (POSIX ``rename``), so a reader sees the old file or
    the new one, never a half-written one. On any failure the temporary file is removed and the
    destination is untouched; an operating-system error (a full disk, a missing folder, no
    permission) becomes one :class:`~detector.errors.InputError` naming the destination. After a
    successful write, temporary files left beside the same destination by runs that were killed
    (their process no longer exists; or, for the schemes of earlier versions, older than an hour)
    are removed. :func:`write_bytes` and :func:`write_text` are the one-call forms.

Locking
    :func:`output_lock` holds an exclusive lock (``flock``) on a lock file beside an output for a
    whole run, so that a second run writing the same output at the same time refuses at once,
    with one line naming the first, instead of both reporting success while one's results vanish.

Names
    :func:`display_name` is how a file name is written into the project's files and messages:
    itself when it is valid UTF-8 (the usual case), otherwise with each byte that is not UTF-8
    written ``%XX`` (two upper-case hex digits), so that every file the project writes stays
    valid UTF-8 and the name still says which file it was.
"""

from __future__ import annotations

from typing import BinaryIO, IO, Iterator

import errno
import hashlib
import io
import os
import re
import stat
import threading
import time
import uuid
from contextlib import contextmanager

from detector.errors import InputError

try:  # POSIX; elsewhere the lock is skipped
    import fcntl
except ImportError:  # pragma: no cover - Windows
    fcntl = None

__all__ = ["NotRegularFileError", "FileTooLargeError", "open_regular", "read_at_most", "read_bytes",
           "atomic_write", "write_bytes", "write_text", "remove_stale_parts", "output_lock",
           "same_file", "display_name", "PART_SUFFIX"]

PART_SUFFIX = ".part"

#: Temporary files of the schemes earlier versions used carry no process id; they count as
#: stale once this old (seconds since their last change).
STALE_AFTER_SECONDS = 3600.0


# ---------------------------------------------------------------------------------------------
# reading


class NotRegularFileError(OSError):
    """The path is a named pipe, a device, a socket or a folder, not a regular file."""

    def __init__(self, path, what: str):
        super().__init__(errno.EINVAL, f"not a regular file ({what})", os.fspath(path))


class FileTooLargeError(OSError):
    """The file holds more bytes than the reader accepts."""

    def __init__(self, path, limit: int):
        super().__init__(errno.EFBIG, f"the file is larger than the limit of {limit:,} bytes",
                         os.fspath(path))


def _kind(mode: int) -> str:
    if stat.S_ISDIR(mode):
        return "a folder"
    if stat.S_ISFIFO(mode):
        return "a named pipe"
    if stat.S_ISCHR(mode):
        return "a character device"
    if stat.S_ISBLK(mode):
        return "a block device"
    if stat.S_ISSOCK(mode):
        return "a socket"
    return "not a file"


def _check_regular(path, mode: int) -> None:
    if stat.S_ISDIR(mode):
        raise IsADirectoryError(errno.EISDIR, "it is a folder, not a file", os.fspath(path))
    if not stat.S_ISREG(mode):
        raise NotRegularFileError(path, _kind(mode))


_READ_FLAGS = (os.O_RDONLY | getattr(os, "O_NONBLOCK", 0) | getattr(os, "O_CLOEXEC", 0)
               | getattr(os, "O_NOCTTY", 0) | getattr(os, "O_BINARY", 0))


def open_regular(path: str | os.PathLike, max_bytes: int | None = None) -> BinaryIO:
    """Open a regular file for reading bytes; refuse anything else before reading from it.

    The path is looked at first (following symbolic links) and again, through the open
    descriptor, after opening: a named pipe is opened without waiting for a writer
    (``O_NONBLOCK``), so even one put in place between the two looks is refused at once.

    Parameters
    ----------
    path : str or os.PathLike
    max_bytes : int, optional
        Refuse a file whose size is larger than this.

    Returns
    -------
    file object opened in binary mode (a context manager)

    Raises
    ------
    NotRegularFileError, IsADirectoryError, FileTooLargeError, OSError
        ``strerror`` says what is wrong; ``filename`` is the path.

    Examples
    --------
    >>> import tempfile
    >>> folder = tempfile.mkdtemp()
    >>> os.mkfifo(os.path.join(folder, "pipe.png"))
    >>> open_regular(os.path.join(folder, "pipe.png"))  # doctest: +ELLIPSIS
    Traceback (most recent call last):
    ...
    detector.io.files.NotRegularFileError: [Errno 22] not a regular file (a named pipe): '.../pipe.png'
    """
    _check_regular(path, os.stat(path).st_mode)
    fd = os.open(path, _READ_FLAGS)
    try:
        info = os.fstat(fd)
        _check_regular(path, info.st_mode)
        if max_bytes is not None and info.st_size > max_bytes:
            raise FileTooLargeError(path, max_bytes)
        return os.fdopen(fd, "rb")
    except BaseException:
        os.close(fd)
        raise


def read_at_most(fh: IO, max_bytes: int | None) -> bytes:
    """Read ``fh`` from where it stands to its end, but at most ``max_bytes + 1`` bytes, without
    setting aside ``max_bytes`` of memory first (``fh.read(n)`` allocates ``n`` bytes before it
    reads: two gigabytes for an empty file under a two-gigabyte limit). The caller refuses a
    result longer than ``max_bytes``.

    >>> import io
    >>> read_at_most(io.BytesIO(b"abcdef"), 3), read_at_most(io.BytesIO(b"ab"), 3)
    (b'abcd', b'ab')
    """
    if max_bytes is None:
        return fh.read()
    try:
        left = os.fstat(fh.fileno()).st_size - fh.tell()
    except (OSError, AttributeError, ValueError, io.UnsupportedOperation):
        left = 0
    first = fh.read(min(max(left, 0), max_bytes) + 1)
    chunks, total = [first], len(first)
    while total <= max_bytes:  # the file was longer than its size said (a /proc file, a growing one)
        block = fh.read(min(1 << 20, max_bytes + 1 - total))
        if not block:
            break
        chunks.append(block)
        total += len(block)
    return first if len(chunks) == 1 else b"".join(chunks)


def read_bytes(path: str | os.PathLike, max_bytes: int | None = None) -> bytes:
    """The bytes of a regular file, at most ``max_bytes`` of them (see :func:`open_regular`).

    At most ``max_bytes + 1`` bytes are read whatever the file claims to be, so a file that grows
    while it is read is refused too.

    Examples
    --------
    >>> import tempfile
    >>> path = os.path.join(tempfile.mkdtemp(), "a.txt")
    >>> write_bytes(path, b"12345")
    >>> read_bytes(path, max_bytes=5)
    b'12345'
    >>> read_bytes(path, max_bytes=4)  # doctest: +ELLIPSIS
    Traceback (most recent call last):
    ...
    detector.io.files.FileTooLargeError: [Errno 27] the file is larger than the limit of 4 bytes: '...'
    """
    with open_regular(path, max_bytes) as fh:
        data = read_at_most(fh, max_bytes)
    if max_bytes is not None and len(data) > max_bytes:
        raise FileTooLargeError(path, max_bytes)
    return data


def same_file(a: str | os.PathLike, b: str | os.PathLike) -> bool:
    """Whether two paths name the same existing file (``os.path.samefile``; False when either
    does not exist or cannot be looked at).

    >>> import tempfile
    >>> folder = tempfile.mkdtemp(); path = os.path.join(folder, "a.csv")
    >>> write_text(path, "x\\n")
    >>> same_file(path, os.path.join(folder, ".", "a.csv")), same_file(path, folder + "/b.csv")
    (True, False)
    """
    try:
        return os.path.samefile(a, b)
    except (OSError, ValueError):
        return False


# ---------------------------------------------------------------------------------------------
# names


def display_name(name: str | bytes) -> str:
    """A file name as the project writes it into its files and messages: valid UTF-8 always.

    A name that is valid UTF-8 is returned unchanged. A byte of the name that is not UTF-8 (on
    POSIX, Python holds such a byte as a lone surrogate, U+DC80 to U+DCFF, "surrogateescape") is
    written as ``%`` and its two upper-case hex digits; any other lone surrogate as ``%u`` and
    four hex digits. A name that already holds such text reads the same, so two files whose
    names differ only that way get the same display name (a scan refuses that, naming both).

    Examples
    --------
    >>> display_name("frame 1.png")
    'frame 1.png'
    >>> display_name(os.fsdecode(b"caf\\xe9/na\\xefve.png"))  # Latin-1 bytes: not UTF-8
    'caf%E9/na%EFve.png'
    """
    name = os.fspath(name)
    try:
        name.encode("utf-8")
        return name
    except UnicodeEncodeError:
        pass
    out = []
    for ch in name:
        code = ord(ch)
        if 0xDC80 <= code <= 0xDCFF:
            out.append(f"%{code - 0xDC00:02X}")
        elif 0xD800 <= code <= 0xDFFF:
            out.append(f"%u{code:04X}")
        else:
            out.append(ch)
    return "".join(out)


# ---------------------------------------------------------------------------------------------
# writing

#: A temporary name must stay within the file system's limit on a name (255 bytes on the usual
#: Linux file systems): longer destination names are shortened, with a digest to keep them apart.
_LONG_NAME = 180


def _stem(base: str) -> str:
    raw = os.fsencode(base)
    if len(raw) <= _LONG_NAME:
        return base
    digest = hashlib.sha256(raw).hexdigest()[:12]
    return os.fsdecode(raw[:_LONG_NAME - 13]) + "~" + digest


def part_path(path: str | os.PathLike) -> str:
    """A fresh temporary path beside ``path``: ``FOLDER/.NAME.PID-RANDOM.part``."""
    folder, base = os.path.split(os.path.abspath(os.fspath(path)))
    return os.path.join(folder, f".{_stem(base)}.{os.getpid()}-{uuid.uuid4().hex[:8]}{PART_SUFFIX}")


def _reason(err: OSError) -> str:
    if isinstance(err, FileNotFoundError):
        return "its folder does not exist"
    if isinstance(err, IsADirectoryError):
        return "a folder of that name is in the way"
    if isinstance(err, PermissionError):
        return "permission denied"
    return (err.strerror or str(err) or type(err).__name__).strip()


def _write_error(err: OSError, path) -> InputError:
    return InputError(f"cannot write the file: {_reason(err)}", path=path)


def _unlink_quietly(path) -> None:
    try:
        os.unlink(path)
    except OSError:
        pass


def _sync_folder(folder: str) -> None:
    """Make the rename itself durable (best effort: not every system can open a folder)."""
    try:
        fd = os.open(folder, os.O_RDONLY | getattr(os, "O_DIRECTORY", 0))
    except OSError:
        return
    try:
        os.fsync(fd)
    except OSError:
        pass
    finally:
        os.close(fd)


@contextmanager
def atomic_write(path: str | os.PathLike, mode: str = "wb", *, encoding: str = "utf-8",
                 newline: str | None = None) -> Iterator[IO]:
    """Write a file atomically: yields a file object on a temporary file beside ``path``; when
    the block ends without an error, the data is synced to the disk and the file renamed over
    ``path``.

    Parameters
    ----------
    path : str or os.PathLike
        The destination. An existing file there is replaced in one step (deciding whether it may
        be is the caller's business); a symbolic link there is replaced, not followed.
    mode : {"wb", "w"}
        Binary or text.
    encoding, newline
        For text mode (as :func:`open`).

    Raises
    ------
    InputError
        Any operating-system error while creating, writing, syncing or renaming (a full disk, a
        missing folder, no permission): one line naming ``path``. Nothing is left behind and
        ``path`` is untouched. Other exceptions from the block pass through, also after the
        temporary file is removed.

    Examples
    --------
    >>> import tempfile
    >>> path = os.path.join(tempfile.mkdtemp(), "notes.txt")
    >>> with atomic_write(path, "w") as fh:
    ...     _ = fh.write("first line\\n")
    >>> open(path).read()
    'first line\\n'
    >>> sorted(os.listdir(os.path.dirname(path)))     # no temporary file left
    ['notes.txt']
    """
    if mode not in ("wb", "w"):
        raise ValueError(f"mode must be 'wb' or 'w', not {mode!r}")
    path = os.fspath(path)
    tmp = part_path(path)
    try:
        fd = os.open(tmp, os.O_WRONLY | os.O_CREAT | os.O_EXCL | getattr(os, "O_CLOEXEC", 0)
                     | getattr(os, "O_BINARY", 0), 0o666)
    except OSError as err:
        raise _write_error(err, path) from None
    try:
        fh = os.fdopen(fd, mode) if mode == "wb" else os.fdopen(fd, mode, encoding=encoding,
                                                               newline=newline)
    except BaseException:
        os.close(fd)
        _unlink_quietly(tmp)
        raise
    try:
        with fh:
            yield fh
            fh.flush()
            os.fsync(fh.fileno())
        os.replace(tmp, path)
    except OSError as err:
        _unlink_quietly(tmp)
        raise _write_error(err, path) from None
    except BaseException:
        _unlink_quietly(tmp)
        raise
    _sync_folder(os.path.dirname(tmp))
    remove_stale_parts(path)


def write_bytes(path: str | os.PathLike, data: bytes) -> None:
    """:func:`atomic_write` of ``data`` (bytes, or anything with the buffer protocol)."""
    with atomic_write(path, "wb") as fh:
        fh.write(data)


def write_text(path: str | os.PathLike, text: str, newline: str = "\n") -> None:
    """:func:`atomic_write` of ``text`` in UTF-8 (``"\\n"`` line ends unless ``newline`` says
    otherwise)."""
    with atomic_write(path, "w", newline=newline) as fh:
        fh.write(text)


# ---------------------------------------------------------------------------------------------
# stale temporary files

_listed_lock = threading.Lock()
_listed: dict[str, list[str]] = {}  # folder -> the temporary files found there at first look


def _process_gone(pid: int) -> bool:
    if pid <= 0 or pid == os.getpid():
        return False
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return True
    except (PermissionError, OSError):
        return False  # it exists (another user's), or we cannot tell: keep its file
    return False


def _stale(folder: str, name: str, stem: str) -> bool:
    """Whether ``name`` in ``folder`` is a temporary file of destination ``stem`` whose writer is
    gone: this scheme with a process that no longer exists, or an earlier version's scheme
    untouched for an hour."""
    prefix = f".{stem}."
    if name.startswith(prefix) and name.endswith(PART_SUFFIX):
        middle = name[len(prefix):-len(PART_SUFFIX)]
        match = re.fullmatch(r"([0-9]+)(?:-[0-9a-f]{8})?", middle)
        if match:
            return _process_gone(int(match.group(1)))
        if not re.fullmatch(r"[A-Za-z0-9_]{8}", middle):  # tempfile.mkstemp's or uuid's 8
            return False
    elif not (name in (f"{stem}.part", f"{stem}.part.png")
              or re.fullmatch(re.escape(prefix) + r"[0-9a-f]{8}\.part\.png", name)):
        return False
    try:
        age = time.time() - os.stat(os.path.join(folder, name)).st_mtime
    except OSError:
        return False
    return age > STALE_AFTER_SECONDS


def remove_stale_parts(path: str | os.PathLike) -> list[str]:
    """Remove the temporary files that killed runs left beside ``path`` (see the module notes).

    The folder is listed once per process (the first time something is written there), so that
    writing many files into one folder stays linear; returns the names removed.

    Examples
    --------
    >>> import subprocess, sys, tempfile
    >>> folder = tempfile.mkdtemp()
    >>> gone = subprocess.run([sys.executable, "-c", "import os; print(os.getpid())"],
    ...                       capture_output=True, text=True).stdout.strip()
    >>> write_bytes(os.path.join(folder, f".bank.npz.{gone}-0123abcd.part"), b"half a bank")
    >>> write_bytes(os.path.join(folder, "bank.npz"), b"a whole bank")   # removes it
    >>> sorted(os.listdir(folder))
    ['bank.npz']
    """
    folder, base = os.path.split(os.path.abspath(os.fspath(path)))
    with _listed_lock:
        names = _listed.get(folder)
        if names is None:
            try:
                names = [n for n in os.listdir(folder)
                         if n.endswith((PART_SUFFIX, ".part.png"))]
            except OSError:
                names = []
            _listed[folder] = names
        stem = _stem(base)
        mine = [n for n in names if _stale(folder, n, stem)]
        removed = []
        for n in mine:
            names.remove(n)
            try:
                os.unlink(os.path.join(folder, n))
                removed.append(n)
            except OSError:
                pass
    return removed


# ---------------------------------------------------------------------------------------------
# output locks


def lock_path(path: str | os.PathLike) -> str:
    """The lock file of an output: ``FOLDER/.NAME.lock``."""
    folder, base = os.path.split(os.path.abspath(os.fspath(path)))
    return os.path.join(folder, f".{_stem(base)}.lock")


def _holder(fd: int) -> str:
    try:
        os.lseek(fd, 0, os.SEEK_SET)
        text = os.read(fd, 4096).decode("utf-8", "replace").strip()
    except OSError:
        text = ""
    return " ".join(text.split())[:200] or "a process that has not said which"


@contextmanager
def output_lock(path: str | os.PathLike, command: str = "patchwood") -> Iterator[None]:
    """Hold an exclusive lock on ``path``'s lock file (:func:`lock_path`) for the block.

    The lock file records who holds it (process id, start time, ``command``); a second run that
    asks for the same output while the first holds it is refused at once. The lock belongs to the
    open file: the operating system releases it when the process ends, however it ends, so a
    killed run never leaves a lock behind that blocks the next one (the file itself is removed
    when the block ends).

    Raises
    ------
    InputError
        Another process holds the lock: one line naming it and the output.

    Examples
    --------
    >>> import tempfile
    >>> out = os.path.join(tempfile.mkdtemp(), "detections.csv")
    >>> with output_lock(out, "first"):  # doctest: +ELLIPSIS
    ...     with output_lock(out, "second"):
    ...         pass
    Traceback (most recent call last):
    ...
    detector.errors.InputError: .../detections.csv: another run is writing this output (process ...: first); wait for it to end or choose another output
    """
    if fcntl is None:  # pragma: no cover - no flock here
        yield
        return
    target = lock_path(path)
    while True:
        try:
            fd = os.open(target, os.O_RDWR | os.O_CREAT | getattr(os, "O_CLOEXEC", 0), 0o666)
        except OSError as err:
            raise InputError(f"cannot lock the output: {_reason(err)}", path=path) from None
        try:
            fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
        except BlockingIOError:
            holder = _holder(fd)
            os.close(fd)
            raise InputError(f"another run is writing this output ({holder}); wait for it to "
                             "end or choose another output", path=path) from None
        except OSError:  # a file system without locks: go on unlocked, as before locks existed
            os.close(fd)
            yield
            return
        # the run that held it may have removed the file meanwhile: lock the file that is there
        try:
            same = os.stat(target).st_ino == os.fstat(fd).st_ino
        except OSError:
            same = False
        if same:
            break
        os.close(fd)
    try:
        note = (f"process {os.getpid()} since {time.strftime('%Y-%m-%d %H:%M:%S')}: "
                f"{display_name(command)}\n")
        os.ftruncate(fd, 0)
        os.write(fd, note.encode("utf-8"))
    except OSError:
        pass
    try:
        yield
    finally:
        _unlink_quietly(target)
        os.close(fd)
