"""Files written whole or not at all, and only over what may be replaced.

The rules, for every file probeplan writes (results, layout CSVs, plots):

* Only a regular file is ever replaced (and only with ``force``): a folder, a FIFO, a socket
  or a device node is refused, and so is a symbolic link — probeplan neither replaces a link
  nor writes through it; name the file itself. A file being read by the same run (the config,
  a layout, an ``--from`` result) is never the output.
* Existence is decided atomically: the file is written under a fresh temporary name in the
  target's folder and then linked to its final name with ``os.link``, which fails if that name
  exists — so a file that appeared while the run worked is never replaced without ``force``.
  Default names move on to the next free one instead (two runs, two files). With ``force`` the
  temporary is renamed over the old file (``os.replace``): a reader sees the old file or the
  whole new one.
* A failed write (a full disk, a read-only folder) is bad input: one line naming the file, and
  nothing half-written is left behind, whatever stopped the write.
"""

from __future__ import annotations

import errno
import itertools
import os
import secrets
import stat
from collections.abc import Callable, Iterable, Iterator, Sequence
from pathlib import Path

from ..errors import InputError

#: errno values of a file system that has no hard links: the name is then claimed by an
#: exclusively created placeholder that the temporary replaces.
_NO_HARD_LINKS = {errno.EPERM, errno.EXDEV, errno.EMLINK, errno.ENOTSUP, errno.EOPNOTSUPP}

_KINDS = (
    (stat.S_ISDIR, "a folder"),
    (stat.S_ISLNK, "a symbolic link"),
    (stat.S_ISFIFO, "a FIFO (named pipe)"),
    (stat.S_ISSOCK, "a socket"),
    (stat.S_ISCHR, "a character device"),
    (stat.S_ISBLK, "a block device"),
)


def os_reason(exc: OSError) -> str:
    """The operating system's words for an OSError (``No space left on device`` …)."""
    return exc.strerror or str(exc) or type(exc).__name__


def _kind(path: Path) -> str | None:
    """What ``path`` is, when it exists and is not a regular file (None otherwise)."""
    try:
        mode = os.lstat(path).st_mode
    except FileNotFoundError:
        return None
    except OSError as exc:
        raise InputError(f"{path}: cannot look at the file: {os_reason(exc)}.") from None
    return next((kind for test, kind in _KINDS if test(mode)), None)


def _refuse_special(target: Path, option: str | None, suffix: str | None = None) -> None:
    """InputError unless ``target`` is absent or a regular file."""
    kind = _kind(target)
    if kind is None:
        return
    other = f" or choose another {option}" if option else ""
    if kind == "a folder":
        suffix = suffix or target.suffix or ".h5"
        hint = f"; give a file name ending in {suffix} to {option}" if option else ""
        raise InputError(f"{target}: is a folder{hint}.")
    if kind == "a symbolic link":
        raise InputError(
            f"{target}: is a symbolic link; probeplan neither replaces a link nor writes "
            f"through it: name the file itself{other}."
        )
    choose = f"; choose another {option}" if option else ""
    raise InputError(
        f"{target}: is {kind}, not a regular file; probeplan replaces only regular files{choose}."
    )


def _same_file(a: Path, b: str | os.PathLike) -> bool:
    try:
        return os.path.samefile(a, b)
    except OSError:  # one of them does not exist (or cannot be looked at): not the same
        return False


def check_writable(
    path: str | os.PathLike,
    *,
    force: bool = False,
    option: str | None = "--out",
    suffix: str = ".h5",
    reading: Sequence[str | os.PathLike] = (),
) -> Path:
    """Check, before any work is spent, that a file could be written to ``path``.

    Parameters
    ----------
    path : str or path-like
    force : bool
        An existing regular file may be replaced.
    option : str or None
        The command-line option that names the file, for the messages (None: the command
        has none; it writes back to a file it read).
    suffix : str
        The file type, for the messages.
    reading : sequence of path-like
        Files this run reads (config, layout, earlier result): never the output.

    Returns
    -------
    Path

    Raises
    ------
    InputError
        The target is not a regular file, exists (without ``force``), is a file being read,
        its folder is missing or cannot be written in.
    """
    target = Path(os.fspath(path))
    _refuse_special(target, option, suffix)
    folder = target.parent
    if not folder.is_dir():
        raise InputError(f"{target}: the folder {folder} does not exist; create it first.")
    for source in reading:
        if _same_file(target, source):
            raise InputError(
                f"{target}: is a file this command reads; choose another {option or 'name'} "
                "for what it writes."
            )
    if os.path.lexists(target) and not force:
        raise InputError(_exists_message(target, option))
    try:  # a real probe: permissions alone do not tell (root, read-only or special mounts)
        _remove_quietly(_claim_temporary(target))
    except OSError as exc:
        raise InputError(_cannot_write(target, f"in the folder {folder}", exc, option)) from None
    return target


def _exists_message(target: Path, option: str | None) -> str:
    other = f", or choose another {option}" if option else ""
    return f"{target} exists; pass --force to overwrite it{other}."


def _cannot_write(target: Path, what: str, exc: OSError, option: str | None) -> str:
    if option:
        hint = f"choose another {option}"
    else:
        hint = "copy the file to a folder you can write in and run the command on the copy"
    reason = " ".join(os_reason(exc).split())  # one line, whatever the library said
    return f"{target}: cannot write {what} ({reason}); nothing was written; {hint}."


def _claim_temporary(target: Path) -> Path:
    """A fresh, empty file beside ``target``, created exclusively (permissions follow the
    umask like any other new file)."""
    while True:
        tmp = target.with_name(f".{target.name}.{os.getpid()}.{secrets.token_hex(4)}.tmp")
        try:
            os.close(os.open(tmp, os.O_WRONLY | os.O_CREAT | os.O_EXCL, 0o666))
        except FileExistsError:
            continue
        return tmp


def write_atomically(
    target: Path,
    write: Callable[[Path], None],
    what: str,
    *,
    force: bool = False,
    option: str | None = "--out",
    names: Iterable[Path] = (),
) -> Path:
    """``write`` a temporary file beside ``target``, then give it its final name.

    Parameters
    ----------
    target : Path
    write : callable(Path)
        Writes the whole file at the path it is given (an empty file, already created).
    what : str
        e.g. ``"the result file"``, for the messages.
    force : bool
        Replace an existing regular file.
    option : str or None
        As for :func:`check_writable`.
    names : iterable of Path
        Names to take in turn when ``target`` (a default name) was taken meanwhile.

    Returns
    -------
    Path
        The file written: ``target``, or one of ``names``.

    Raises
    ------
    InputError
        The target is not a regular file, exists (without ``force`` and ``names``), or the
        write failed (full disk, read-only folder …); nothing is left behind.
    """
    _refuse_special(target, option)
    try:
        tmp = _claim_temporary(target)
    except OSError as exc:
        raise InputError(_cannot_write(target, what, exc, option)) from None
    try:
        write(tmp)
        _sync(tmp)
        return _commit(tmp, target, force, option, iter(names))
    except OSError as exc:
        raise InputError(_cannot_write(target, what, exc, option)) from None
    finally:
        # Never leave a temporary behind, whatever stopped the write; after a link the final
        # name holds the file, after a rename the temporary name is gone already.
        _remove_quietly(tmp)


def _commit(tmp: Path, target: Path, force: bool, option: str | None, names: Iterator) -> Path:
    """Give ``tmp`` the name ``target`` (or the next of ``names``), never replacing a file
    that is not ours unless ``force``."""
    if force:
        _refuse_special(target, option)
        os.replace(tmp, target)
        return target
    final = target
    while not _link_exclusively(tmp, final):
        final = next(names, None)
        if final is None:
            raise InputError(_exists_message(target, option))
    return final


def _link_exclusively(tmp: Path, final: Path) -> bool:
    """Give ``tmp`` the name ``final`` as well, unless that name exists (False)."""
    try:
        os.link(tmp, final)
        return True
    except FileExistsError:
        return False
    except OSError as exc:
        if exc.errno not in _NO_HARD_LINKS:
            raise
    try:  # no hard links on this file system: claim the name exclusively, then fill it
        os.close(os.open(final, os.O_WRONLY | os.O_CREAT | os.O_EXCL, 0o666))
    except FileExistsError:
        return False
    os.replace(tmp, final)
    return True


def _sync(path: Path) -> None:
    """Flush ``path``'s data to the disk before it gets its final name, so that the name never
    points at a file a power cut could leave half-written."""
    fd = os.open(path, os.O_RDONLY)
    try:
        os.fsync(fd)
    finally:
        os.close(fd)


def _remove_quietly(path: Path) -> None:
    try:
        path.unlink()
    except FileNotFoundError:
        pass


def free_names(stem: str, folder: str | os.PathLike = ".", suffix: str = ".h5") -> Iterator[Path]:
    """``<stem>.h5``, ``<stem>-2.h5``, ``<stem>-3.h5`` … in a folder, without end."""
    base = Path(os.fspath(folder))
    yield base / f"{stem}{suffix}"
    for k in itertools.count(2):
        yield base / f"{stem}-{k}{suffix}"


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
        ``folder / name``; the file does not exist (at the time of the call: a run writing to
        a default name later takes the next free one if it was taken meanwhile, see
        :func:`write_atomically`).
    """
    return next(p for p in free_names(stem, folder) if not os.path.lexists(p))
