"""Where the store lives: a local directory or any filesystem pyarrow.fs knows.

The store root (SORBRANK_DATA_DIR) is a local path or a URI that
``pyarrow.fs.FileSystem.from_uri`` understands: ``file:///srv/sorbrank``,
``s3://bucket/prefix``, ``gs://bucket/prefix``, ``hdfs://host/path``. The
store does every file operation through the resulting
``pyarrow.fs.FileSystem``; this module adds the two pyarrow does not offer
as such: an atomic write and a create-if-absent.

How a write is made atomic depends on the filesystem:

* local (``LocalFileSystem``, also what ``file://`` gives): a dot-named temp
  file, fsynced, renamed over the target, then the directory fsynced. After a
  crash or a power cut readers see the old file or the new one, never a mix.
* object stores (s3, gcs, abfs) have no rename (pyarrow's ``move`` is copy +
  delete), but one PUT is atomic: readers see the old object or the whole new
  one. The bytes are assembled in memory and put once, straight to the target.
* any other filesystem (hdfs, ``SubTreeFileSystem``, ``PyFileSystem``
  handlers): a dot-named temp file, then ``move`` (a rename where the
  filesystem has one). pyarrow exposes no fsync for these.

On a local filesystem files get the permission bits of SORBRANK_FILE_MODE
(default 0640) and the directories this module creates the same bits plus
search wherever read is given, whatever the process umask: an API and
workers running as different users of one group can then share a store.

Create-if-absent (the Idempotency-Key claim) is exact on a local filesystem
(a hard link never replaces a name). Elsewhere it is check-then-put: two
processes racing with one key within a few milliseconds can both win.
"""
from __future__ import annotations

import contextlib
import errno
import os
import shutil
import posixpath
import secrets
import tempfile
from typing import Any, Callable

import pyarrow as pa
import pyarrow.fs as pafs

from .settings import store_file_mode

OBJECT_STORES = frozenset({"s3", "gcs", "abfs"})


def open_root(root: str | os.PathLike, filesystem: pafs.FileSystem | None = None
              ) -> tuple[pafs.FileSystem, str]:
    """(filesystem, base path inside it) for a store root.

    ``root`` is a local path or a URI; with ``filesystem`` given, ``root`` is
    a path inside that filesystem ("" for its top).
    """
    text = os.fspath(root)
    if filesystem is not None:
        return filesystem, text.rstrip("/")
    if "://" in text:
        filesystem, path = pafs.FileSystem.from_uri(text)
    else:
        filesystem, path = pafs.LocalFileSystem(), os.path.abspath(text)
    return filesystem, path.rstrip("/") or "/"


def is_local(filesystem: pafs.FileSystem) -> bool:
    return filesystem.type_name == "local"


def fsync_dir(path: str | os.PathLike) -> None:
    # the rename itself must survive a power cut, not only the file's bytes
    fd = os.open(path, os.O_RDONLY)
    try:
        os.fsync(fd)
    finally:
        os.close(fd)


def directory_mode(file_mode: int) -> int:
    """``file_mode`` plus search (x) for each of owner, group, others that may read."""
    return file_mode | ((file_mode & 0o444) >> 2)


def make_dirs(path: str) -> None:
    """``os.makedirs(path, exist_ok=True)``, each directory it creates given the
    store's directory mode (makedirs alone would leave them to the umask)."""
    missing = []
    folder = path
    while folder and not os.path.isdir(folder):
        missing.append(folder)
        folder = os.path.dirname(folder)
    os.makedirs(path, exist_ok=True)
    mode = directory_mode(store_file_mode())
    for folder in reversed(missing):
        # another process (perhaps another user) may have made it first: its mode stands
        with contextlib.suppress(PermissionError):
            os.chmod(folder, mode)


def _temp_file(parent: str, name: str) -> tuple[int, str]:
    """A dot-named temp file beside ``name``, already carrying the store's file mode
    (mkstemp makes it 0600)."""
    make_dirs(parent)
    fd, tmp = tempfile.mkstemp(prefix=f".{name}.", suffix=".tmp", dir=parent)
    os.fchmod(fd, store_file_mode())
    return fd, tmp


def local_atomic_write(path: str | os.PathLike, write: Callable[[Any], None]) -> None:
    """Write via ``write(fileobj)`` to a dot-temp file, fsync, rename to ``path``."""
    path = os.fspath(path)
    parent, name = os.path.split(path)
    fd, tmp = _temp_file(parent, name)
    try:
        with os.fdopen(fd, "wb") as fh:
            write(fh)
            fh.flush()
            os.fsync(fh.fileno())
        os.replace(tmp, path)
    except BaseException:
        with contextlib.suppress(FileNotFoundError):
            os.unlink(tmp)
        raise
    fsync_dir(parent)


def atomic_write(filesystem: pafs.FileSystem, path: str, write: Callable[[Any], None]) -> None:
    """Write ``path`` via ``write(fileobj)`` so readers never see half a file."""
    if is_local(filesystem):
        local_atomic_write(path, write)
        return
    parent = posixpath.dirname(path)
    filesystem.create_dir(parent, recursive=True)  # a no-op on object stores
    if filesystem.type_name in OBJECT_STORES:
        buffer = pa.BufferOutputStream()  # a failed write never starts the upload
        write(buffer)
        data = buffer.getvalue()
        with filesystem.open_output_stream(path) as out:
            out.write(data)
        return
    tmp = posixpath.join(parent, f".{posixpath.basename(path)}.{secrets.token_hex(6)}.tmp")
    try:
        with filesystem.open_output_stream(tmp) as out:
            write(out)
        filesystem.move(tmp, path)
    except BaseException:
        with contextlib.suppress(OSError):
            filesystem.delete_file(tmp)
        raise


def create_if_absent(filesystem: pafs.FileSystem, path: str, data: bytes) -> bool:
    """Write ``data`` to ``path`` unless it exists; True when this call created it."""
    if not is_local(filesystem):
        if filesystem.get_file_info(path).type != pafs.FileType.NotFound:
            return False
        atomic_write(filesystem, path, lambda fh: fh.write(data))
        return True
    parent, name = os.path.split(path)
    fd, tmp = _temp_file(parent, name)
    try:
        with os.fdopen(fd, "wb") as fh:
            fh.write(data)
            fh.flush()
            os.fsync(fh.fileno())
        try:
            os.link(tmp, path)  # the complete file appears at once, or not at all
        except FileExistsError:
            return False
        fsync_dir(parent)
        return True
    finally:
        os.unlink(tmp)


def read_bytes(filesystem: pafs.FileSystem, path: str) -> bytes | None:
    """The file's bytes; None when it does not exist."""
    try:
        with filesystem.open_input_stream(path) as fh:
            return fh.read()
    except FileNotFoundError:
        return None


def list_dir(filesystem: pafs.FileSystem, path: str, recursive: bool = False) -> list[pafs.FileInfo]:
    """Entries under ``path``; empty when it does not exist."""
    return filesystem.get_file_info(pafs.FileSelector(path, allow_not_found=True,
                                                      recursive=recursive))


# a full disk, or a quota reached: the write may succeed once space is freed
NO_SPACE_ERRNOS = frozenset({errno.ENOSPC, errno.EDQUOT})
# a store mounted read-only, or files this user may not write
READ_ONLY_ERRNOS = frozenset({errno.EROFS, errno.EACCES, errno.EPERM})


def _os_errnos(exc: BaseException | None) -> set[int]:
    # pyarrow re-raises a Python file object's OSError inside its own, so the
    # errno may sit anywhere in the chain of causes
    found, seen = set(), set()
    while exc is not None and id(exc) not in seen:
        seen.add(id(exc))
        if isinstance(exc, OSError) and exc.errno is not None:
            found.add(exc.errno)
        elif "No space left on device" in str(exc):
            found.add(errno.ENOSPC)
        exc = exc.__cause__ or exc.__context__
    return found


def out_of_space(exc: BaseException) -> bool:
    """True when ``exc`` (or what caused it) is a full disk or an exhausted quota."""
    return bool(_os_errnos(exc) & NO_SPACE_ERRNOS)


def read_only(exc: BaseException) -> bool:
    """True when ``exc`` (or what caused it) says the store may not be written."""
    return bool(_os_errnos(exc) & READ_ONLY_ERRNOS)


def free_bytes(filesystem: pafs.FileSystem, path: str) -> int | None:
    """Bytes free for writing under ``path`` on a local filesystem; None elsewhere
    (object stores have no such figure) or when the path cannot be examined."""
    if not is_local(filesystem):
        return None
    folder = path
    while folder and not os.path.isdir(folder):  # the store root may not exist yet
        folder = os.path.dirname(folder)
    try:
        return shutil.disk_usage(folder or "/").free
    except OSError:
        return None
