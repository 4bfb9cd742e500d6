"""Atomic file output and content hashes.

Every file the project writes goes through :func:`atomic_write`: the content is
written to a hidden temporary name in the destination folder, flushed to disk,
then renamed over the destination. A reader therefore sees either the previous
file or the complete new one, never a half-written file, and a crash leaves at
most a ``.tmp-*`` file that no reader looks at.
"""

from __future__ import annotations

import contextlib
import errno
import fcntl
import hashlib
import json
import os
import tempfile
from collections.abc import Callable, Iterator
from pathlib import Path

from predictor.errors import OutputError

TEMP_MARK = ".tmp-"


@contextlib.contextmanager
def atomic_path(destination: str | os.PathLike[str]) -> Iterator[Path]:
    """Yield a temporary path beside ``destination``; rename it into place on success.

    The temporary name keeps the destination's suffixes (``.nii.gz`` stays
    ``.nii.gz``) so that libraries choosing a format by extension still work.
    On any exception the temporary file is removed and the destination is
    untouched.
    """
    destination = Path(destination)
    destination.parent.mkdir(parents=True, exist_ok=True)
    suffix = "".join(destination.suffixes[-2:]) if destination.suffixes else ""
    handle, name = tempfile.mkstemp(
        prefix=f".{destination.name}{TEMP_MARK}", suffix=suffix, dir=destination.parent
    )
    os.close(handle)
    temporary = Path(name)
    try:
        yield temporary
        with open(temporary, "rb+") as stream:
            os.fsync(stream.fileno())
        os.replace(temporary, destination)
    except OSError as error:
        temporary.unlink(missing_ok=True)
        if error.errno == errno.ENOSPC:
            raise OutputError(
                f"{destination}: disk full while writing; the previous file (if any) is intact"
            ) from error
        raise
    except BaseException:
        temporary.unlink(missing_ok=True)
        raise


@contextlib.contextmanager
def exclusive(lock: str | os.PathLike[str]) -> Iterator[None]:
    """Hold an exclusive advisory lock (``fcntl.flock``) on the file ``lock``; wait for it.

    Two runs working on the same output (a cache entry, a participant's
    forecast) take turns: the second finds the first one's complete result.
    The lock file itself stays (it is empty); the lock ends with the process.
    """
    lock = Path(lock)
    lock.parent.mkdir(parents=True, exist_ok=True)
    with open(lock, "a") as handle:
        fcntl.flock(handle, fcntl.LOCK_EX)
        try:
            yield
        finally:
            fcntl.flock(handle, fcntl.LOCK_UN)


def atomic_write(destination: str | os.PathLike[str], writer: Callable[[Path], None]) -> Path:
    """Call ``writer(temporary_path)`` and rename the result to ``destination``."""
    with atomic_path(destination) as temporary:
        writer(temporary)
    return Path(destination)


def write_bytes(destination: str | os.PathLike[str], data: bytes) -> Path:
    """Write ``data`` atomically."""
    return atomic_write(destination, lambda path: path.write_bytes(data))


def write_text(destination: str | os.PathLike[str], text: str) -> Path:
    """Write UTF-8 ``text`` atomically."""
    return write_bytes(destination, text.encode("utf-8"))


def write_json(destination: str | os.PathLike[str], payload: object) -> Path:
    """Write ``payload`` as indented, key-sorted JSON (deterministic bytes)."""
    return write_text(destination, json.dumps(payload, indent=2, sort_keys=True) + "\n")


def sha256_file(path: str | os.PathLike[str], chunk_bytes: int = 1 << 20) -> str:
    """Hex SHA-256 of a file's bytes, read in chunks."""
    digest = hashlib.sha256()
    with open(path, "rb") as stream:
        while chunk := stream.read(chunk_bytes):
            digest.update(chunk)
    return digest.hexdigest()


def write_tsv(destination: str | os.PathLike[str], frame, float_format: str = "%.6g") -> Path:
    """Write a pandas DataFrame as a tab-separated table without its index."""
    return atomic_write(
        destination,
        lambda path: frame.to_csv(
            path, sep="\t", index=False, float_format=float_format, lineterminator="\n"
        ),
    )


def redact_folders(text: str, *paths: str | os.PathLike[str]) -> str:
    """``text`` with the folders of ``paths`` removed, keeping only file names.

    Failure tables name the file without leaking where it lives (a folder name
    may identify a participant or a site).
    """
    for path in paths:
        if path:
            folder = str(Path(path).parent)
            text = text.replace(folder + os.sep, "")
    return text
