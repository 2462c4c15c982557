"""The snapshot store: numbered generations of snapshot files in one directory.

Generation ``g`` is the file ``<g as 12 digits>.snap``, in the format of
:mod:`thresher.snapshot_format` (re-exported here). A write goes to a temp file that is
fsynced and renamed into place, then the directory is fsynced, so a crash leaves either the
old generations or the new one; the newest ``keep`` are kept, and temp files of dead writers
are removed. Loading falls back past generations that fail their checks, saying why.
"""

from __future__ import annotations

import hashlib
import logging
import os
import re
import threading
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from .errors import NotFound, Unavailable
from .snapshot_format import (
    ALIGN,
    CRC,
    DIGEST_BYTES,
    EXT_ARRAY,
    EXT_SCALAR,
    KINDS,
    MAGIC,
    MAX_HEADER_BYTES,
    PREFIX,
    TREE,
    VERSION,
    CorruptSnapshot,
    Sparse,
    capture,
    decode,
    decode_file,
    encode,
    encode_parts,
    read_header,
)

# The public names, the file format's included: callers import them from here.
__all__ = [
    "ALIGN",
    "CRC",
    "DIGEST_BYTES",
    "EXT_ARRAY",
    "EXT_SCALAR",
    "KINDS",
    "MAGIC",
    "MAX_HEADER_BYTES",
    "PREFIX",
    "TREE",
    "VERSION",
    "CorruptSnapshot",
    "Skipped",
    "SnapshotInfo",
    "SnapshotStore",
    "Sparse",
    "capture",
    "decode",
    "decode_file",
    "encode",
    "read_header",
]

_NAME = re.compile(r"^(\d{12})\.snap$")
_TEMP = re.compile(r"^\.(\d{12})\.snap\.tmp-(\d+)$")

_log = logging.getLogger("thresher.snapshots")
SYNC_EVERY = 8 << 20  # bytes of a snapshot written between fdatasync calls
WRITE_SLICE = 1 << 22  # bytes hashed and written at a time


@dataclass(frozen=True)
class SnapshotInfo:
    """One stored generation; ``offset`` is the log offset to replay from after loading it."""

    generation: int
    offset: int
    time: float
    bytes: int
    path: Path

    def to_json(self) -> dict[str, Any]:
        return {"generation": self.generation, "offset": self.offset, "time": self.time,
                "bytes": self.bytes}  # fmt: skip


Skipped = list[tuple[SnapshotInfo, str]]  # generations load_newest passed over, and why


class SnapshotStore:
    """Numbered snapshot generations in one directory, written atomically, newest ``keep`` kept.

    ``write`` blocks (encode, write, fsync); run it in a worker thread with copies of arrays
    or their :func:`capture` forms. Arrays are written straight from those, never joined.
    """

    def __init__(self, directory: str | os.PathLike[str], keep: int = 5) -> None:
        if keep < 1:
            raise ValueError("keep must be at least 1")
        self.directory = Path(directory)
        self.keep = keep
        self._mutex = threading.Lock()
        self._last = 0

    def _path(self, generation: int) -> Path:
        return self.directory / f"{generation:012d}.snap"

    def generations(self) -> list[int]:
        """Generation numbers present on disk, newest first, without opening the files."""
        if not self.directory.is_dir():
            return []
        found = (_NAME.match(name) for name in os.listdir(self.directory))
        return sorted((int(m.group(1)) for m in found if m), reverse=True)

    def write(self, state: dict[str, Any], *, offset: int, time: float) -> SnapshotInfo:
        """Store ``state`` as the next generation; raises ``Unavailable`` when the disk fails."""
        with self._mutex:
            self.directory.mkdir(parents=True, exist_ok=True)
            self._remove_dead_temps()
            generation = max([self._last, *self.generations()[:1]]) + 1
            meta: dict[str, Any] = {"generation": generation, "offset": int(offset)}
            meta["time"] = float(time)
            parts = encode_parts(state, meta)
            path = self._path(generation)
            temp = self.directory / f".{path.name}.tmp-{os.getpid()}"
            try:
                digest, unsynced = hashlib.sha256(), 0
                with open(temp, "wb") as handle:
                    for part in parts:
                        # Slices hashed just before they are written are still in the cache.
                        view = memoryview(part)
                        for lo in range(0, len(view), WRITE_SLICE):
                            piece = view[lo : lo + WRITE_SLICE]
                            digest.update(piece)
                            handle.write(piece)
                            unsynced += len(piece)
                            if unsynced >= SYNC_EVERY:
                                # The file system commits dirty data in order: a label log
                                # fsync issued now would wait for all of this file too. Flushing
                                # it in steps keeps each such wait short.
                                handle.flush()
                                os.fdatasync(handle.fileno())
                                unsynced = 0
                    handle.write(digest.digest())
                    handle.flush()
                    os.fsync(handle.fileno())
                os.replace(temp, path)
                _fsync_dir(self.directory)
            except OSError as exc:
                temp.unlink(missing_ok=True)
                raise Unavailable(
                    f"snapshot cannot be written: {exc.strerror or exc}; "
                    "the earlier generations are kept"
                ) from exc
            self._last = generation
            size = sum(len(p) for p in parts) + DIGEST_BYTES
            for old in self.generations()[self.keep :]:
                self._path(old).unlink(missing_ok=True)
            _fsync_dir(self.directory)
            return SnapshotInfo(generation, meta["offset"], meta["time"], size, path)

    def _remove_dead_temps(self) -> None:
        """Delete temp files left by a process that died mid-write."""
        for name in os.listdir(self.directory):
            match = _TEMP.match(name)
            if match and int(match.group(2)) != os.getpid() and not _alive(int(match.group(2))):
                (self.directory / name).unlink(missing_ok=True)

    def info(self, generation: int) -> SnapshotInfo:
        """The header of one generation; raises ``NotFound`` or :class:`CorruptSnapshot`."""
        path = self._path(generation)
        try:
            with open(path, "rb") as handle:
                start = handle.read(PREFIX.size)
                if len(start) == PREFIX.size:
                    start += handle.read(min(PREFIX.unpack(start)[2], MAX_HEADER_BYTES) + CRC.size)
                size = os.fstat(handle.fileno()).st_size
        except FileNotFoundError:
            raise NotFound(f"no snapshot generation {generation}") from None
        meta, _ = read_header(start)
        return _info(meta, generation, size, path)

    def list(self) -> list[SnapshotInfo]:
        """Every generation whose header reads, newest first; the weights are not decoded."""
        infos = []
        for generation in self.generations():
            try:
                infos.append(self.info(generation))
            except (CorruptSnapshot, NotFound, OSError):
                continue  # load_newest reports it; listings stay quiet
        return infos

    def load(self, generation: int) -> dict[str, Any]:
        """The verified state of one generation."""
        return self._load(generation)[0]

    def _load(self, generation: int) -> tuple[dict[str, Any], SnapshotInfo]:
        path = self._path(generation)
        try:
            with open(path, "rb") as handle:
                data = bytearray(os.fstat(handle.fileno()).st_size)
                if handle.readinto(data) != len(data):
                    raise CorruptSnapshot(f"{path.name} changed size while it was read")
        except FileNotFoundError:
            raise NotFound(f"no snapshot generation {generation}") from None
        meta, state = decode_file(data)
        return state, _info(meta, generation, len(data), path)

    def load_newest(
        self,
    ) -> tuple[dict[str, Any], SnapshotInfo, Skipped] | None:
        """The newest generation that verifies, with the newer ones skipped and why."""
        skipped: Skipped = []
        for generation in self.generations():
            try:
                state, info = self._load(generation)
            except NotFound:
                continue  # pruned between listing and reading
            except (CorruptSnapshot, OSError) as exc:
                path = self._path(generation)
                try:
                    bad = self.info(generation)
                except (CorruptSnapshot, NotFound, OSError):
                    bad = SnapshotInfo(generation, -1, 0.0, _size(path), path)
                _log.warning("snapshot %s skipped: %s", path, exc)
                skipped.append((bad, str(exc)))
                continue
            return state, info, skipped
        return None

    def oldest_offset(self) -> int | None:
        """The lowest log offset any kept generation replays from; None without snapshots."""
        offsets = [info.offset for info in self.list()]
        return min(offsets) if offsets else None


def _info(meta: dict[str, Any], generation: int, size: int, path: Path) -> SnapshotInfo:
    offset, stamp = meta.get("offset"), meta.get("time")
    if meta.get("generation") != generation or not isinstance(offset, int):
        raise CorruptSnapshot(f"{path.name}: header does not describe generation {generation}")
    if not isinstance(stamp, float):
        raise CorruptSnapshot(f"{path.name}: header time is not a number")
    return SnapshotInfo(generation, offset, stamp, size, path)


def _size(path: Path) -> int:
    try:
        return path.stat().st_size
    except OSError:
        return 0


def _alive(pid: int) -> bool:
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:
        pass  # exists, owned by someone else
    return True


def _fsync_dir(directory: Path) -> None:
    fd = os.open(directory, os.O_RDONLY)
    try:
        os.fsync(fd)
    finally:
        os.close(fd)
