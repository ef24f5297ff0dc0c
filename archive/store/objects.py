"""Content-addressed object store: files named by the SHA-256 of their bytes.

An object is written once (temporary file, fsync, atomic rename), made read-only and never
rewritten; putting bytes that are already stored is a no-op that returns the same hash.
Objects live under ``<root>/<h[:2]>/<h[2:4]>/<h>``. The local backend works on a folder;
any other URL (``s3://bucket/prefix``) goes through a :mod:`pyarrow.fs` filesystem, where an
upload only becomes visible once complete, so the same guarantees hold.
"""

from __future__ import annotations

import contextlib
import errno
import hashlib
import io
import os
import stat
import tempfile
import uuid
from collections.abc import Callable, Iterator
from pathlib import Path
from typing import BinaryIO, TypeVar

import pyarrow as pa
import pyarrow.fs as pafs
import pyarrow.parquet as pq

from archive.errors import IntegrityError, ObjectDamaged, ReadOnly, StorageError
from archive.store import durable
from archive.store.hashing import CHUNK, is_hash
from archive.store.remote import remote_filesystem

# errno values of a storage that refuses writes: disk full, quota, read-only, permission.
STORAGE_ERRNOS = {errno.ENOSPC, errno.EDQUOT, errno.EROFS, errno.EACCES, errno.EPERM}

PARQUET_OPTIONS = {"compression": "zstd", "compression_level": 3, "write_statistics": True}


_Data = TypeVar("_Data", bytes, pa.Buffer)


def fanout(h: str) -> str:
    """Relative path of an object: two levels of two hex characters, then the full hash."""
    if not is_hash(h):
        raise ValueError(f"not a SHA-256 hex digest: {h!r}")
    return f"{h[:2]}/{h[2:4]}/{h}"


class ObjectStore:
    """Put, open and check objects by hash. ``read_only`` refuses every write."""

    def __init__(self, url: str | Path, *, read_only: bool = False) -> None:
        self.url = str(url)
        self.read_only = read_only
        self.refusal: tuple[str, str] | None = None  # (archive, reason) set by its Archive
        if "://" in self.url and not self.url.startswith("file://"):
            fs, base = remote_filesystem(self.url)
            self._fs: pafs.FileSystem | None = fs
            self._base = base.rstrip("/")
            self.root: Path | None = None
        else:
            self._fs = None
            self.root = Path(self.url.removeprefix("file://"))
            self._base = str(self.root)
        self.describe: Callable[[str], str | None] | None = None
        """Names what an object belongs to, for error messages (set by the archive)."""
        self._verified: dict[str, tuple[int, int, int]] = {}

    # -- naming -------------------------------------------------------------------------
    @property
    def is_local(self) -> bool:
        """True for a folder on this machine."""
        return self.root is not None

    def location(self, h: str) -> str:
        """Where the object lives: a local path or a filesystem path inside the bucket."""
        return f"{self._base}/{fanout(h)}"

    def local_path(self, h: str) -> Path | None:
        """Local path of an object (``None`` on a remote store)."""
        return None if self.root is None else self.root / fanout(h)

    # -- queries ------------------------------------------------------------------------
    def exists(self, h: str) -> bool:
        """True when an object with this hash is stored."""
        if self.root is not None:
            return (self.root / fanout(h)).is_file()
        info = self._fs.get_file_info(self.location(h))
        return info.type == pafs.FileType.File

    def size(self, h: str) -> int:
        """Size in bytes of a stored object."""
        if self.root is not None:
            return (self.root / fanout(h)).stat().st_size
        return self._fs.get_file_info(self.location(h)).size

    def iter_hashes(self) -> Iterator[str]:
        """Every object hash present in the store (temporary files excluded)."""
        if self.root is not None:
            if not self.root.exists():
                return
            for first in sorted(self.root.iterdir()):
                if len(first.name) != 2 or not first.is_dir():
                    continue
                for second in sorted(first.iterdir()):
                    for f in sorted(second.iterdir()):
                        if is_hash(f.name):
                            yield f.name
            return
        sel = pafs.FileSelector(self._base, recursive=True, allow_not_found=True)
        for info in self._fs.get_file_info(sel):
            name = info.base_name
            if info.type == pafs.FileType.File and is_hash(name) and "/tmp/" not in info.path:
                yield name

    # -- reading ------------------------------------------------------------------------
    # Every read that hands content to a caller checks the bytes against the object's name
    # first (streamed for files that are parsed in place, on the bytes for whole reads), so
    # a changed or cut object stops the command instead of feeding a computation. A local
    # object verified once is not hashed again in the same process while its size, inode
    # and modification time stay the same (objects are written once and made read-only).
    def _damaged(self, h: str, detail: str) -> ObjectDamaged:
        owner = None
        if self.describe is not None:
            try:
                owner = self.describe(h)
            except Exception:  # noqa: BLE001 - the catalog may be damaged too; the hash suffices
                owner = None
        return ObjectDamaged(h, detail, owner)

    def _stamp(self, h: str) -> tuple[int, int, int] | None:
        if self.root is None:
            return None
        try:
            st = (self.root / fanout(h)).stat()
        except OSError:
            return None
        return (st.st_size, st.st_mtime_ns, st.st_ino)

    def open(self, h: str) -> BinaryIO:
        """Open an object for reading (binary), unchecked: for callers that hash as they
        read (:meth:`check`). Raises :class:`ObjectDamaged` when it is missing."""
        try:
            if self.root is not None:
                return open(self.root / fanout(h), "rb")
            return self._fs.open_input_stream(self.location(h))
        except (FileNotFoundError, OSError) as exc:
            raise self._damaged(h, "is missing from the object store") from exc

    def ensure_intact(self, h: str) -> None:
        """Re-hash an object (streamed) unless verified earlier in this process; raises
        :class:`ObjectDamaged` naming the object and its owner when it is missing or changed."""
        stamp = self._stamp(h)
        if stamp is not None and self._verified.get(h) == stamp:
            return
        if not self.check(h):
            raise self._damaged(h, "no longer matches its hash (its bytes were changed)")
        if stamp is not None:
            self._verified[h] = stamp

    def require(self, h: str, *, rehash: bool = True) -> None:
        """Raise :class:`ObjectDamaged` unless the object is stored (and, with ``rehash``,
        still matches its hash)."""
        if not self.exists(h):
            raise self._damaged(h, "is missing from the object store")
        if rehash:
            self.ensure_intact(h)

    def _checked(self, h: str, data: _Data) -> _Data:
        """``data`` (the whole object just read) once it matches its hash; an object of a
        local store is then noted as verified for as long as its file is unchanged."""
        if hashlib.sha256(data).hexdigest() != h:
            raise self._damaged(h, "no longer matches its hash (its bytes were changed)")
        stamp = self._stamp(h)
        if stamp is not None:
            self._verified[h] = stamp
        return data

    def read_bytes(self, h: str) -> bytes:
        """Whole content of an object, checked against its hash."""
        with self.open(h) as fh:
            data = fh.read()
        return self._checked(h, data)

    def read_buffer(self, h: str) -> pa.Buffer:
        """Whole content of an object in memory Arrow owns, checked against its hash.

        Parquet is parsed from such buffers, never from Python ``bytes``: Arrow's reader
        threads may drop their last reference to the source a moment after a read returns,
        and letting go of a buffer over a Python object needs the interpreter, which a
        thread can no longer take once the interpreter has begun to shut down (the process
        then aborts: "terminate called without an active exception"). Both ways of opening
        give a seekable Arrow file, whose whole-file read lands in Arrow's memory pool (a
        forward-only stream would hand back Python bytes)."""
        try:
            if self.root is not None:
                fh = pa.OSFile(str(self.root / fanout(h)), "r")
            else:
                fh = self._fs.open_input_file(self.location(h))
        except OSError as exc:
            raise self._damaged(h, "is missing from the object store") from exc
        with fh:
            data = fh.read_buffer()
        return self._checked(h, data)

    def parquet_file(self, h: str, read_dictionary: list[str] | None = None
                     ) -> pq.ParquetFile:
        """A ParquetFile over a stored, checked Parquet object (for streaming by row group);
        the columns of ``read_dictionary`` are read dictionary-encoded."""
        self.ensure_intact(h)
        try:
            if self.root is not None:
                return pq.ParquetFile(str(self.root / fanout(h)), memory_map=True,
                                      read_dictionary=read_dictionary)
            return pq.ParquetFile(self._fs.open_input_file(self.location(h)),
                                  read_dictionary=read_dictionary)
        except (pa.ArrowException, OSError) as exc:
            raise self._damaged(h, f"is not a readable Parquet table ({exc})") from exc

    def parquet_in_memory(self, h: str, read_dictionary: list[str] | None = None
                          ) -> pq.ParquetFile:
        """A ParquetFile over a stored Parquet object read once into memory and checked
        against its hash on those very bytes (one pass over the object instead of a
        re-hash and a second read); the columns of ``read_dictionary`` are read
        dictionary-encoded. For objects of a few megabytes, read whole anyway."""
        data = self.read_buffer(h)
        try:
            return pq.ParquetFile(data, read_dictionary=read_dictionary)
        except (pa.ArrowException, OSError) as exc:
            raise self._damaged(h, f"is not a readable Parquet table ({exc})") from exc

    def read_table(self, h: str, columns: list[str] | None = None) -> pa.Table:
        """Read a stored Parquet object, checked against its hash, as an Arrow table."""
        data = self.read_buffer(h)
        try:
            return pq.ParquetFile(data).read(columns=columns)
        except (pa.ArrowException, OSError) as exc:
            raise self._damaged(h, f"is not a readable Parquet table ({exc})") from exc

    def check(self, h: str) -> bool:
        """Re-hash a stored object; True when its bytes still match its name."""
        digest = hashlib.sha256()
        with self.open(h) as fh:
            while chunk := fh.read(CHUNK):
                digest.update(chunk)
        return digest.hexdigest() == h

    # -- writing ------------------------------------------------------------------------
    def _refuse_if_read_only(self) -> None:
        if self.read_only:
            where, reason = self.refusal or (self.url, "the object store is open read-only")
            raise ReadOnly(where, reason, what="storing an object")

    def put_bytes(self, data: bytes) -> tuple[str, int]:
        """Store bytes; returns (hash, size). Idempotent."""
        return self.put_stream(io.BytesIO(data))

    def put_file(self, path: str | Path) -> tuple[str, int]:
        """Store a file's bytes, streamed; returns (hash, size). Idempotent."""
        with open(path, "rb") as fh:
            return self.put_stream(fh)

    def put_table(self, table: pa.Table) -> tuple[str, int]:
        """Store an Arrow table as Parquet (zstd); returns (hash, size) of the Parquet bytes."""
        sink = pa.BufferOutputStream()
        pq.write_table(table, sink, **PARQUET_OPTIONS)
        return self.put_bytes(sink.getvalue().to_pybytes())

    def put_stream(self, stream: BinaryIO) -> tuple[str, int]:
        """Store everything left in a binary stream; returns (hash, size). Idempotent.

        A storage that refuses the write (disk full, read-only, no permission) raises
        :class:`StorageError`; no partial object is left behind."""
        self._refuse_if_read_only()
        try:
            if self.root is not None:
                return self._put_local(stream)
            return self._put_remote(stream)
        except OSError as exc:
            self._refuse_storage(exc, "this write was not recorded")
            raise

    def _refuse_storage(self, exc: OSError, what: str) -> None:
        """Raise :class:`StorageError` (saying ``what`` of the write stands) when a failed
        write is the storage refusing it (disk full, read-only, no permission); any other
        error is the caller's to re-raise."""
        if exc.errno in STORAGE_ERRNOS:
            raise StorageError(f"cannot write to the object store {self.url}: {exc.strerror}",
                               hint=f"{what}; free space or make the folder writable and run "
                                    "the command again") from exc

    def _put_local(self, stream: BinaryIO) -> tuple[str, int]:
        """A temporary file written and flushed as the stream is hashed, then named
        (:meth:`adopt`, which removes it when the object is already stored)."""
        digest = hashlib.sha256()
        size = 0
        fd, tmp = self._create_temporary("put-")
        try:
            with os.fdopen(fd, "wb") as out:
                while chunk := stream.read(CHUNK):
                    digest.update(chunk)
                    size += len(chunk)
                    out.write(chunk)
                out.flush()
                os.fsync(out.fileno())
        except BaseException:
            with contextlib.suppress(FileNotFoundError):
                os.unlink(tmp)
            raise
        h = digest.hexdigest()
        self.adopt(tmp, h, size)
        return h, size

    def _put_remote(self, stream: BinaryIO) -> tuple[str, int]:
        digest = hashlib.sha256()
        size = 0
        tmp = f"{self._base}/tmp/{uuid.uuid4().hex}"
        with self._fs.open_output_stream(tmp) as out:
            while chunk := stream.read(CHUNK):
                digest.update(chunk)
                size += len(chunk)
                out.write(chunk)
        h = digest.hexdigest()
        try:
            if not self.exists(h):
                self._fs.copy_file(tmp, self.location(h))
        finally:
            self._fs.delete_file(tmp)
        return h, size

    def temporary(self, prefix: str = "put-") -> Path:
        """A new empty temporary file for an object being written elsewhere (a loading
        process writes its raw copy and tables there, then :meth:`adopt` names them).
        On a local store it lies in the store's own ``tmp`` folder (same filesystem, so
        adopting is a rename); on a remote store in the system's temporary folder."""
        fd, tmp = self._create_temporary(prefix)
        os.close(fd)
        return tmp

    def write_temporary(self, data: bytes | memoryview, *, sync: bool = True) -> Path:
        """A new temporary file (as :meth:`temporary`) holding ``data``, written through
        the descriptor that created it and, with ``sync``, flushed to disk. A failed write
        removes the file and raises (:class:`StorageError` when the storage refused it)."""
        fd, tmp = self._create_temporary("put-")
        try:
            with open(fd, "wb", closefd=True) as fh:
                fh.write(data)
                if sync:
                    fh.flush()
                    os.fsync(fh.fileno())
        except BaseException as exc:
            with contextlib.suppress(FileNotFoundError):
                os.unlink(tmp)
            if isinstance(exc, OSError):
                self._refuse_storage(exc, "nothing was recorded")
            raise
        return tmp

    def _create_temporary(self, prefix: str) -> tuple[int, Path]:
        self._refuse_if_read_only()
        try:
            if self.root is not None:
                tmpdir = self.root / "tmp"
                try:  # the folder is made when missing, not looked at for every file
                    fd, tmp = tempfile.mkstemp(dir=tmpdir, prefix=prefix)
                except FileNotFoundError:
                    tmpdir.mkdir(parents=True, exist_ok=True)
                    fd, tmp = tempfile.mkstemp(dir=tmpdir, prefix=prefix)
            else:
                fd, tmp = tempfile.mkstemp(dir=tempfile.gettempdir(), prefix=prefix)
        except OSError as exc:
            self._refuse_storage(exc, "nothing was recorded")
            raise
        return fd, Path(tmp)

    def adopt(self, tmp: str | Path, h: str, size: int, *, sync_dir: bool = True) -> bool:
        """Make the finished temporary file ``tmp`` the object ``h`` (its SHA-256, computed
        by whoever wrote it, and already flushed to disk). Returns False when that object
        was already stored (``tmp`` is removed). On a local store this is a rename, and
        the folder is flushed unless ``sync_dir`` is false (the caller then calls
        :meth:`sync_folders` for many objects at once); a remote store uploads ``tmp``.
        A storage that refuses the write raises :class:`StorageError`; ``tmp`` is removed
        either way."""
        self._refuse_if_read_only()
        tmp = Path(tmp)
        named = False
        try:
            if self.root is None:
                with open(tmp, "rb") as fh:
                    got, _ = self._put_remote(fh)
                if got != h:
                    raise IntegrityError(f"temporary object {tmp} does not hash to {h}")
                return True
            final = self.root / fanout(h)
            if final.is_file():
                return False
            os.chmod(tmp, stat.S_IRUSR | stat.S_IRGRP | stat.S_IROTH)
            try:
                os.replace(tmp, final)
            except FileNotFoundError:  # its folder is new (made only when needed)
                final.parent.mkdir(parents=True, exist_ok=True)
                os.replace(tmp, final)
            named = True
            if sync_dir:
                durable.fsync_dir(final.parent)
            return True
        except OSError as exc:
            self._refuse_storage(exc, "this write was not recorded")
            raise
        finally:
            if not named:
                with contextlib.suppress(FileNotFoundError):
                    os.unlink(tmp)

    def sync_folders(self, hashes: list[str]) -> None:
        """Flush the folders of freshly adopted objects (once each), so their names survive
        a power loss before the catalog records them."""
        if self.root is not None:
            durable.fsync_folders({(self.root / fanout(h)).parent for h in hashes})

    def can_sync_filesystem(self) -> bool:
        """True when :meth:`sync_filesystem` can make this store durable in one call (a
        local store on Linux, see :func:`archive.store.durable.syncfs`)."""
        return self.root is not None and durable.syncfs_available()

    def sync_filesystem(self) -> None:
        """Make everything written so far to the store's file system durable (file data,
        names and folders, whichever process wrote them) in one call
        (:func:`archive.store.durable.syncfs`). A loader writing thousands of small objects
        calls this once per batch, before the catalog records them, instead of flushing
        every file and folder. :class:`StorageError` when the file system reports a write
        error."""
        if self.root is None or not durable.syncfs_available():
            raise StorageError("flushing a whole file system needs a local store on Linux")
        try:
            durable.syncfs(self.root)
        except OSError as exc:
            raise StorageError(f"cannot write to the object store {self.url}: {exc.strerror}",
                               hint="the files of this batch were not recorded; check the "
                                    "disk and run the command again") from exc
