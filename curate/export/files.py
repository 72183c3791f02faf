"""What every writer shares: the output folder rule, atomic writes, file hashes, the clock."""

from __future__ import annotations

import datetime as dt
import hashlib
import os
import tempfile
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path
from typing import Any

from curate.errors import InputError
from curate.jsontext import to_json

__all__ = [
    "atomic_file",
    "now_utc",
    "prepare_folder",
    "sha256_file",
    "write_bytes",
    "write_json",
    "write_text",
]


def prepare_folder(outdir: Path, *, force: bool) -> None:
    """Create the export folder; refuse a non-empty one unless ``force`` (nothing is deleted)."""
    if outdir.exists() and not outdir.is_dir():
        raise InputError(f"{outdir}: exists and is not a folder")
    if outdir.is_dir() and any(outdir.iterdir()) and not force:
        raise InputError(
            f"{outdir}: the folder exists and is not empty; choose a new one, or pass --force to write our files into it (nothing else is touched)"
        )
    outdir.mkdir(parents=True, exist_ok=True)


@contextmanager
def atomic_file(path: Path) -> Iterator[Path]:
    """Give a temporary file beside ``path`` to write (by a library that writes files itself);
    it becomes ``path`` when the block ends, and is removed if the block fails."""
    path.parent.mkdir(parents=True, exist_ok=True)
    handle, name = tempfile.mkstemp(dir=path.parent, prefix=f".{path.name}.", suffix=".part")
    os.close(handle)
    temporary = Path(name)
    try:
        yield temporary
        _share(temporary)
        os.replace(temporary, path)
    except BaseException:
        temporary.unlink(missing_ok=True)
        raise


def _share(path: Path) -> None:
    umask = os.umask(0)
    os.umask(umask)
    os.chmod(path, 0o666 & ~umask)  # mkstemp makes files private; exports are for sharing


def write_bytes(path: Path, data: bytes, *, make_folders: bool = True) -> str:
    """Write a file atomically (temporary file, then rename); give its sha256.

    ``make_folders=False``: the folder must exist (a file a person names, such as a report).
    """
    if path.is_dir():
        raise InputError(f"{path}: is a folder; expected a file name (e.g. {path / 'report.html'})")
    if path.parent.exists() and not path.parent.is_dir():
        raise InputError(f"{path.parent}: is a file, not a folder to write {path.name} into")
    if not make_folders and not path.parent.is_dir():
        raise InputError(f"{path.parent}: no such folder; create it first, or name another file")
    path.parent.mkdir(parents=True, exist_ok=True)
    handle, temporary = tempfile.mkstemp(dir=path.parent, prefix=f".{path.name}.", suffix=".part")
    try:
        with os.fdopen(handle, "wb") as stream:
            stream.write(data)
        _share(Path(temporary))
        os.replace(temporary, path)
    except BaseException:
        Path(temporary).unlink(missing_ok=True)
        raise
    return hashlib.sha256(data).hexdigest()


def write_text(path: Path, text: str, *, make_folders: bool = True) -> str:
    """Write UTF-8 text atomically; give its sha256."""
    return write_bytes(path, text.encode("utf-8"), make_folders=make_folders)


def write_json(path: Path, data: Any, *, sort_keys: bool = False) -> str:
    """Write strict JSON (no NaN or Infinity: null instead) atomically; give its sha256."""
    return write_text(path, to_json(data, sort_keys=sort_keys) + "\n")


def sha256_file(path: Path) -> str:
    """Give a file's sha256."""
    digest = hashlib.sha256()
    with path.open("rb") as stream:
        for block in iter(lambda: stream.read(1 << 20), b""):
            digest.update(block)
    return digest.hexdigest()


def now_utc() -> str:
    """Give the current UTC time as ISO 8601 with Z."""
    return dt.datetime.now(dt.UTC).strftime("%Y-%m-%dT%H:%M:%SZ")
