"""Files written whole or not at all: the checks before a run spends its time, the atomic
write, and the default output names."""

from __future__ import annotations

import os
import tempfile
from collections.abc import Callable
from pathlib import Path

from ..errors import InputError


def write_atomically(target: Path, write: Callable[[Path], None], what: str) -> Path:
    """``write`` a temporary file beside ``target``, then rename it to ``target``: a reader
    sees the old file or the whole new one, never half of it."""
    tmp = target.with_name(f".{target.name}.tmp-{os.getpid()}")
    try:
        write(tmp)
        os.replace(tmp, target)
    except OSError as exc:
        _remove_quietly(tmp)
        raise InputError(f"{target}: cannot write {what}: {os_reason(exc)}.") from None
    except BaseException:
        # Never leave a half-written temporary behind, whatever stopped the write.
        _remove_quietly(tmp)
        raise
    return target


def check_writable(
    path: str | os.PathLike, *, force: bool = False, option: str = "--out", suffix: str = ".h5"
) -> Path:
    """Check, before any work is spent, that a result could be written to ``path``.

    ``option`` and ``suffix`` name the command-line option and file type in the messages.

    Raises
    ------
    InputError
        As :func:`write_result` would.
    """
    target = Path(os.fspath(path))
    if target.is_dir():
        raise InputError(f"{target}: is a folder; give a file name ending in {suffix} to {option}.")
    folder = target.parent
    if not folder.is_dir():
        raise InputError(f"{target}: the folder {folder} does not exist; create it first.")
    if target.exists() and not force:
        raise InputError(
            f"{target} exists; pass --force to overwrite it, or choose another {option}."
        )
    try:  # a real probe: permissions alone do not tell (root, read-only or special mounts)
        with tempfile.TemporaryFile(dir=folder):
            pass
    except OSError as exc:
        raise InputError(
            f"{target}: cannot write in the folder {folder} ({exc.strerror}); choose another "
            f"{option}."
        ) from None
    return target


def _remove_quietly(path: Path) -> None:
    try:
        path.unlink()
    except FileNotFoundError:
        pass


def os_reason(exc: OSError) -> str:
    return exc.strerror or str(exc) or type(exc).__name__


def free_name(stem: str, folder: str | os.PathLike = ".") -> Path:
    """The first free file name ``<stem>.h5``, ``<stem>-2.h5``, ``<stem>-3.h5`` … in a folder.

    Parameters
    ----------
    stem : str
        e.g. the config file's stem.
    folder : str or path-like

    Returns
    -------
    Path
        ``folder / name``; the file does not exist (at the time of the call).
    """
    base = Path(os.fspath(folder))
    candidate = base / f"{stem}.h5"
    k = 2
    while candidate.exists():
        candidate = base / f"{stem}-{k}.h5"
        k += 1
    return candidate
