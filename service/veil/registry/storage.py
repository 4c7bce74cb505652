"""Where the registry's files live: a local directory, or any fsspec URL.

The registry needs five primitives, and each backend provides them with the
strongest guarantee its medium offers:

================  ==========================================  ==========================================
primitive         local directory                             fsspec URL (object store)
================  ==========================================  ==========================================
replace a file    temp file, fsync, ``os.replace``, dir fsync   one whole-object put (objects appear whole)
create once       temp file, fsync, ``os.link`` (fails if      ``open(mode="xb")`` (conditional put where
                  the name exists)                            the store supports it)
publish a dir     staging dir, fsync, ``os.rename``           files first, the seal file last
lock              ``fcntl.flock`` (released if killed)        a lease object created once, with expiry
================  ==========================================  ==========================================

On both, a version counts as visible only when its seal file exists, so a
reader never sees a partial version whichever backend wrote it.
"""

from __future__ import annotations

import contextlib
import fcntl
import json
import os
import shutil
import tempfile
import time
import uuid
from collections.abc import Iterator, Mapping
from pathlib import Path
from typing import Any, Protocol

from veil.registry.errors import LockTimeoutError, RegistryLocationError

STAGING_DIR = ".staging"
# A staging directory untouched this long belongs to a writer that died.
STALE_STAGING_SECONDS = 3600.0
LOCK_POLL_SECONDS = 0.05


class Storage(Protocol):
    """The file primitives the registry is built on; paths are relative and ``/``-separated."""

    url: str

    def read(self, path: str) -> bytes:
        """The whole file; raises ``FileNotFoundError`` if it is missing."""
        ...

    def exists(self, path: str) -> bool: ...

    def list(self, path: str) -> list[str]:
        """Names of the entries directly under ``path`` (empty if it does not exist)."""
        ...

    def replace(self, path: str, data: bytes) -> None:
        """Write ``data`` so readers see either the old file or the new one, never a mix."""
        ...

    def create_once(self, path: str, data: bytes) -> bool:
        """Write a complete new file; False, and nothing written, if ``path`` already exists."""
        ...

    def publish(self, path: str, files: Mapping[str, bytes], *, seal: str) -> None:
        """Create directory ``path`` holding ``files``, with file ``seal`` written last.

        Raises ``FileExistsError`` if ``path`` exists.
        """
        ...

    def lock(self, path: str, *, timeout: float) -> contextlib.AbstractContextManager[None]:
        """Hold an exclusive lock named ``path`` for the ``with`` block."""
        ...


def _fsync_directory(path: Path) -> None:
    descriptor = os.open(path, os.O_RDONLY | os.O_DIRECTORY)
    try:
        os.fsync(descriptor)
    finally:
        os.close(descriptor)


def _write_synced(path: Path, data: bytes) -> None:
    with path.open("wb") as handle:
        handle.write(data)
        handle.flush()
        os.fsync(handle.fileno())


class LocalStorage:
    """A registry in a local (or network-mounted, POSIX) directory."""

    def __init__(self, root: Path) -> None:
        self.root = root
        self.url = str(root)

    def _path(self, path: str) -> Path:
        return self.root / path

    @contextlib.contextmanager
    def _located(self) -> Iterator[None]:
        """Name a file that stands where the registry needs a directory, instead of a bare ``[Errno 20]``."""
        try:
            yield
        except RegistryLocationError:
            raise
        except NotADirectoryError as error:
            raise self._misplaced_file(error) from None

    def _misplaced_file(self, error: NotADirectoryError) -> NotADirectoryError:
        failed = Path(error.filename) if error.filename else self.root
        blocking = next((p for p in [*reversed(failed.parents), failed] if p.exists() and not p.is_dir()), None)
        if blocking is None:
            return error
        if blocking == self.root:
            return RegistryLocationError(f"the registry {self.root} is a file, not a directory")
        if blocking in self.root.parents:
            return RegistryLocationError(f"the registry {self.root} cannot be a directory: {blocking} is a file")
        return NotADirectoryError(f"the registry {self.root} is damaged: {blocking} is a file where a folder belongs")

    def read(self, path: str) -> bytes:
        with self._located():
            return self._path(path).read_bytes()

    def exists(self, path: str) -> bool:
        return self._path(path).exists()

    def list(self, path: str) -> list[str]:
        # Only a missing path lists as empty: a file in the way or a refused read is an error to report.
        try:
            with self._located():
                return sorted(entry.name for entry in self._path(path).iterdir())
        except FileNotFoundError:
            return []

    def _temporary_beside(self, target: Path, data: bytes) -> Path:
        target.parent.mkdir(parents=True, exist_ok=True)
        descriptor, name = tempfile.mkstemp(dir=target.parent, prefix=f".{target.name}.", suffix=".tmp")
        os.close(descriptor)
        temporary = Path(name)
        _write_synced(temporary, data)
        return temporary

    def replace(self, path: str, data: bytes) -> None:
        target = self._path(path)
        with self._located():
            temporary = self._temporary_beside(target, data)
        os.replace(temporary, target)
        _fsync_directory(target.parent)

    def create_once(self, path: str, data: bytes) -> bool:
        target = self._path(path)
        with self._located():
            temporary = self._temporary_beside(target, data)
        try:
            # link(2) fails if the name exists, and the file it names is already complete.
            os.link(temporary, target)
        except FileExistsError:
            return False
        finally:
            temporary.unlink()
        _fsync_directory(target.parent)
        return True

    def publish(self, path: str, files: Mapping[str, bytes], *, seal: str) -> None:
        target = self._path(path)
        if target.exists():
            raise FileExistsError(f"{target} already exists")
        staging_root = target.parent.parent / STAGING_DIR
        with self._located():
            staging_root.mkdir(parents=True, exist_ok=True)
        self._remove_stale_staging(staging_root)
        staging = staging_root / uuid.uuid4().hex
        staging.mkdir()
        try:
            for name, data in files.items():
                if name != seal:
                    _write_synced(staging / name, data)
            _write_synced(staging / seal, files[seal])
            _fsync_directory(staging)
            target.parent.mkdir(parents=True, exist_ok=True)
            if target.exists():
                raise FileExistsError(f"{target} already exists")
            # rename(2) of a directory is atomic: the version appears complete or not at all.
            os.rename(staging, target)
        except BaseException:
            shutil.rmtree(staging, ignore_errors=True)
            raise
        _fsync_directory(target.parent)

    @staticmethod
    def _remove_stale_staging(staging_root: Path) -> None:
        cutoff = time.time() - STALE_STAGING_SECONDS
        for leftover in staging_root.iterdir():
            with contextlib.suppress(OSError):
                if leftover.stat().st_mtime < cutoff:
                    shutil.rmtree(leftover)

    @contextlib.contextmanager
    def lock(self, path: str, *, timeout: float) -> Iterator[None]:
        target = self._path(path)
        with self._located():
            target.parent.mkdir(parents=True, exist_ok=True)
        deadline = time.monotonic() + timeout
        # flock is released by the kernel when the holder dies, so a kill -9 never leaves a stuck lock.
        with target.open("a+b") as handle:
            while True:
                try:
                    fcntl.flock(handle.fileno(), fcntl.LOCK_EX | fcntl.LOCK_NB)
                    break
                except BlockingIOError:
                    if time.monotonic() > deadline:
                        raise LockTimeoutError(f"{target} is held by another process") from None
                    time.sleep(LOCK_POLL_SECONDS)
            try:
                yield
            finally:
                fcntl.flock(handle.fileno(), fcntl.LOCK_UN)


class FsspecStorage:
    """A registry on any fsspec filesystem (``memory://``, ``s3://``, ``gs://``, ...).

    Object stores have no rename, so a version is published by writing its
    files in place and its seal last; readers ignore a version without a
    seal.  The lock is a lease object created with exclusive-create mode and
    an expiry, so a dead holder's lease lapses after ``lease_seconds``.
    """

    def __init__(self, url: str, *, lease_seconds: float = 60.0, storage_options: Mapping[str, Any] | None = None):
        import fsspec  # only registries on remote stores need it

        self.url = url.rstrip("/")
        try:
            self.fs, self._root = fsspec.core.url_to_fs(self.url, **dict(storage_options or {}))
        except (ValueError, ImportError) as error:
            # fsspec's words for an unknown protocol or a missing backend ("Install s3fs to access S3").
            raise RegistryLocationError(f"the registry {self.url} cannot be opened: {error}") from None
        self.lease_seconds = lease_seconds

    def _path(self, path: str) -> str:
        return f"{self._root}/{path}"

    def read(self, path: str) -> bytes:
        data: bytes = self.fs.cat_file(self._path(path))
        return data

    def exists(self, path: str) -> bool:
        return bool(self.fs.exists(self._path(path)))

    def list(self, path: str) -> list[str]:
        full = self._path(path)
        if not self.fs.isdir(full):
            return []
        return sorted(entry.rstrip("/").rsplit("/", 1)[-1] for entry in self.fs.ls(full, detail=False))

    def replace(self, path: str, data: bytes) -> None:
        self.fs.pipe_file(self._path(path), data)

    def create_once(self, path: str, data: bytes) -> bool:
        try:
            with self.fs.open(self._path(path), "xb") as handle:
                handle.write(data)
        except FileExistsError:
            return False
        return True

    def publish(self, path: str, files: Mapping[str, bytes], *, seal: str) -> None:
        if self.exists(f"{path}/{seal}"):
            raise FileExistsError(f"{self._path(path)} already exists")
        for name, data in files.items():
            if name != seal:
                self.replace(f"{path}/{name}", data)
        if not self.create_once(f"{path}/{seal}", files[seal]):
            raise FileExistsError(f"{self._path(path)} already exists")

    @contextlib.contextmanager
    def lock(self, path: str, *, timeout: float) -> Iterator[None]:
        owner = uuid.uuid4().hex
        deadline = time.monotonic() + timeout
        while True:
            lease = json.dumps({"owner": owner, "expires": time.time() + self.lease_seconds}).encode()
            if self.create_once(path, lease):
                break
            self._break_if_expired(path)
            if time.monotonic() > deadline:
                raise LockTimeoutError(f"{self._path(path)} is held by another writer")
            time.sleep(LOCK_POLL_SECONDS)
        try:
            yield
        finally:
            with contextlib.suppress(FileNotFoundError, ValueError):
                if json.loads(self.read(path)).get("owner") == owner:
                    self.fs.rm_file(self._path(path))

    def _break_if_expired(self, path: str) -> None:
        try:
            held = json.loads(self.read(path))
        except FileNotFoundError:
            return
        except ValueError:
            held = {"expires": 0.0}
        if float(held.get("expires", 0.0)) < time.time():
            with contextlib.suppress(FileNotFoundError):
                self.fs.rm_file(self._path(path))


def open_storage(url: str | os.PathLike[str]) -> Storage:
    """A :class:`LocalStorage` for a path or ``file://`` URL, a :class:`FsspecStorage` for any other URL."""
    text = os.fspath(url)
    if "://" not in text:
        return LocalStorage(Path(text).expanduser().resolve())
    if text.startswith("file://"):
        return LocalStorage(Path(text.removeprefix("file://")).expanduser().resolve())
    return FsspecStorage(text)
