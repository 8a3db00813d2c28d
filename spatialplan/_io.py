"""Atomic file writing and input fingerprints shared by every stage that writes files."""

from __future__ import annotations

import contextlib
import hashlib
import os
import tempfile
from collections.abc import Iterator
from pathlib import Path

__all__ = ["atomic_path", "sha256_file", "write_text_atomic"]


@contextlib.contextmanager
def atomic_path(target: str | Path, suffix: str | None = None) -> Iterator[Path]:
    """Yield a temporary path next to ``target``; rename it onto ``target`` on success.

    The temporary file lives in the same folder so the final :func:`os.replace` is atomic
    on the same file system. On any exception the temporary file is removed and an
    earlier ``target`` is left untouched.

    Parameters
    ----------
    target
        Final path.
    suffix
        Suffix of the temporary file (defaults to the target's, which drivers such as
        GDAL use to pick a format).
    """
    target = Path(target)
    suffix = target.suffix if suffix is None else suffix
    fd, tmp = tempfile.mkstemp(prefix=f".{target.stem}.", suffix=f".tmp{suffix}", dir=target.parent)
    os.close(fd)
    tmp_path = Path(tmp)
    tmp_path.unlink()  # writers such as GDAL want to create the file themselves
    try:
        yield tmp_path
        os.replace(tmp_path, target)
    finally:
        if tmp_path.exists():
            tmp_path.unlink()
        # GeoPackage side files that a crashed writer may leave behind
        for side in ("-wal", "-shm", "-journal"):
            p = Path(str(tmp_path) + side)
            if p.exists():
                p.unlink()


def sha256_file(path: str | Path, chunk: int = 1 << 20) -> str:
    """SHA-256 hex digest of a file."""
    h = hashlib.sha256()
    with open(path, "rb") as f:
        while block := f.read(chunk):
            h.update(block)
    return h.hexdigest()


def write_text_atomic(path: str | Path, text: str, what: str) -> None:
    """Write UTF-8 ``text`` to ``path`` atomically; an OS failure becomes an OutputError.

    ``what`` names the file in the message (``"map"``, ``"report"`` ...).
    """
    from spatialplan.errors import OutputError

    try:
        with atomic_path(path) as tmp:
            tmp.write_text(text, encoding="utf-8")
    except OSError as exc:
        msg = f"cannot write {what} {path}: {exc}"
        raise OutputError(msg) from exc
