"""The filesystem backend: a directory, written through temporary files, fsync and link/rename.

``put_new`` writes a temporary file in the target directory, fsyncs it and hard-links it to
the final name: ``link(2)`` fails if the name exists, so creation is atomic and exclusive even
between processes (common practice for create-if-absent on POSIX filesystems).
``put`` renames over the target (``rename(2)`` replaces atomically). The directory is fsynced
after either so the new name survives a crash.
"""

from __future__ import annotations

import contextlib
import os
import uuid
from pathlib import Path

from model_store.backends.base import KeyExists, KeyMissing, check_key
from model_store.errors import StoreUnavailable


class FileBackend:
    def __init__(self, root: str | os.PathLike[str]):
        self.root = Path(root)
        self.uri = str(self.root)

    def _path(self, key: str) -> Path:
        check_key(key)
        return self.root / key

    def _unavailable(self, exc: OSError) -> StoreUnavailable:
        return StoreUnavailable(f"store {self.uri}: {exc.strerror or exc}")

    def get(self, key: str) -> bytes:
        try:
            return self._path(key).read_bytes()
        except (FileNotFoundError, NotADirectoryError, IsADirectoryError):
            raise KeyMissing(key) from None
        except OSError as exc:
            raise self._unavailable(exc) from exc

    def _make_dirs(self, folder: Path) -> None:
        """mkdir -p, fsyncing the parent of every directory created (so it survives a crash)."""
        missing = []
        while not folder.is_dir() and folder.parent != folder:
            missing.append(folder)
            folder = folder.parent
        for new in reversed(missing):
            new.mkdir(exist_ok=True)
            self._sync_dir(new.parent)

    def _write_temp(self, path: Path, data: bytes) -> Path:
        self._make_dirs(path.parent)
        temp = path.parent / f".tmp-{uuid.uuid4().hex}-{path.name}"
        fd = os.open(temp, os.O_WRONLY | os.O_CREAT | os.O_EXCL, 0o644)
        try:
            view = memoryview(data)
            while view:
                view = view[os.write(fd, view) :]
            os.fsync(fd)
        except BaseException:
            os.close(fd)
            with contextlib.suppress(OSError):
                os.unlink(temp)
            raise
        os.close(fd)
        return temp

    @staticmethod
    def _sync_dir(path: Path) -> None:
        fd = os.open(path, os.O_RDONLY)
        try:
            os.fsync(fd)
        finally:
            os.close(fd)

    def put_new(self, key: str, data: bytes) -> None:
        path = self._path(key)
        try:
            temp = self._write_temp(path, data)
            try:
                os.link(temp, path)
            except FileExistsError:
                raise KeyExists(key) from None
            finally:
                with contextlib.suppress(FileNotFoundError):
                    os.unlink(temp)
            self._sync_dir(path.parent)
        except OSError as exc:
            raise self._unavailable(exc) from exc

    def exists(self, key: str) -> bool:
        return self._path(key).is_file()

    def list(self, prefix: str) -> list[str]:
        base = self.root / prefix if prefix else self.root
        if not base.is_dir():
            if base.exists():
                raise StoreUnavailable(f"store {self.uri}: {prefix or '.'} is not a directory")
            return []
        keys = []
        try:
            for dirpath, dirnames, filenames in os.walk(base):
                dirnames[:] = [d for d in dirnames if not d.startswith(".")]
                rel = Path(dirpath).relative_to(self.root).as_posix()
                lead = "" if rel == "." else f"{rel}/"
                keys += [f"{lead}{f}" for f in filenames if not f.startswith(".")]
        except OSError as exc:
            raise self._unavailable(exc) from exc
        return sorted(keys)

    def ensure(self) -> None:
        try:
            self.root.mkdir(parents=True, exist_ok=True)
        except OSError as exc:
            raise self._unavailable(exc) from exc

    def check(self) -> None:
        if self.root.exists() and not self.root.is_dir():
            raise StoreUnavailable(f"store {self.uri}: not a directory")
        if self.root.is_dir() and not os.access(self.root, os.R_OK | os.X_OK):
            raise StoreUnavailable(f"store {self.uri}: not readable")
