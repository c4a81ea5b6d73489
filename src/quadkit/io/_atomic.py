"""Atomic writing: build the file under a temporary name beside the target, then rename.

A reader never sees a half-written file, an error while writing leaves nothing behind, and an
existing file is only replaced when the caller says ``overwrite=True``.
"""

from __future__ import annotations

import contextlib
import os
import shutil
import uuid
from collections.abc import Iterator
from pathlib import Path

from .._errors import CaptureError

__all__ = ["atomic_path", "FileExistsCaptureError", "FolderMissingCaptureError"]


class FileExistsCaptureError(FileExistsError, ValueError):
    """The target file exists and ``overwrite`` was not given.

    A :class:`FileExistsError` (so ``except OSError`` catches it) and a :class:`ValueError`
    (so the command line's user-error handler, which catches ``ValueError``, catches it too).
    """


class FolderMissingCaptureError(FileNotFoundError, CaptureError):
    """The folder to write into does not exist.

    A :class:`FileNotFoundError` and a :class:`quadkit.CaptureError`, so either handler
    catches it.
    """


def _remove(path: Path) -> None:
    if path.is_dir() and not path.is_symlink():
        shutil.rmtree(path, ignore_errors=True)
    else:
        with contextlib.suppress(FileNotFoundError):
            path.unlink()


def check_writable(path: str | os.PathLike[str], *, overwrite: bool) -> Path:
    """Raise :class:`FileExistsCaptureError` if ``path`` exists and ``overwrite`` is false."""
    target = Path(path)
    if not overwrite and (target.exists() or target.is_symlink()):
        raise FileExistsCaptureError(
            f"{target}: file exists; pass overwrite=True to replace it, or choose another name"
        )
    return target


@contextlib.contextmanager
def atomic_path(path: str | os.PathLike[str], *, overwrite: bool = False) -> Iterator[Path]:
    """Context manager yielding a temporary path beside ``path``; renamed onto it on success.

    Write the file (or directory, for a Zarr store) at the yielded path. When the block ends
    without an exception the temporary is renamed onto ``path`` (an atomic
    :func:`os.replace` for files); when it raises, the temporary is removed and ``path`` is
    untouched.

    Parameters
    ----------
    path : str or path-like
        The final name.
    overwrite : bool, default False
        Replace an existing ``path``. Without it an existing ``path`` raises
        :class:`FileExistsCaptureError` before anything is written.

    Examples
    --------
    >>> import tempfile, pathlib
    >>> from quadkit.io._atomic import atomic_path
    >>> target = pathlib.Path(tempfile.mkdtemp()) / "note.txt"
    >>> with atomic_path(target) as tmp:
    ...     _ = tmp.write_text("bench 3, board B")
    >>> target.read_text()
    'bench 3, board B'
    >>> with atomic_path(target) as tmp:
    ...     pass
    Traceback (most recent call last):
    ...
    quadkit.io._atomic.FileExistsCaptureError: .../note.txt: file exists; pass overwrite=True to replace it, or choose another name
    """
    target = check_writable(path, overwrite=overwrite)
    if not target.parent.is_dir():
        raise FolderMissingCaptureError(
            f"{target}: the folder {target.parent} does not exist; create it first "
            "(or give a path in an existing folder)"
        )
    tmp = target.with_name(f".{target.name}.{uuid.uuid4().hex[:12]}.part")
    try:
        yield tmp
        if not tmp.exists():
            raise RuntimeError(f"{target}: nothing was written to the temporary file {tmp}")
        # Check again: another writer may have created the target meanwhile.
        check_writable(target, overwrite=overwrite)
        if tmp.is_dir() and target.exists():
            # os.replace cannot replace a non-empty directory: move the old one aside first.
            old = target.with_name(f".{target.name}.{uuid.uuid4().hex[:12]}.old")
            os.replace(target, old)
            os.replace(tmp, target)
            _remove(old)
        else:
            if target.is_dir() and not target.is_symlink():
                _remove(target)
            os.replace(tmp, target)
    except BaseException:
        _remove(tmp)
        raise
