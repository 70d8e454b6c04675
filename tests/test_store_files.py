"""Writing files safely (store.files): only regular files are replaced, existence is decided
atomically, a failed write is named and leaves nothing behind."""

from __future__ import annotations

import errno
import os
import socket
import stat

import numpy as np
import pytest
from result_builders import assert_results_equal, make_result

from probeplan.errors import InputError
from probeplan.store import check_writable, free_names, read_result, write_result
from probeplan.store import files as store_files
from probeplan.store import write as store_write


def result(seed: int):
    return make_result(np.random.default_rng(seed))


def _make_node(path, kind: str) -> None:
    if kind == "fifo":
        os.mkfifo(path)
    elif kind == "socket":
        sock = socket.socket(socket.AF_UNIX)
        sock.bind(os.fspath(path))
        sock.close()  # the socket file stays
    elif kind == "folder":
        path.mkdir()
    elif kind == "device":
        try:  # /dev/null's numbers (1, 3) on Linux, common practice; only root may make one
            os.mknod(path, stat.S_IFCHR | 0o600, os.makedev(1, 3))
        except PermissionError:
            pytest.skip("making a device node needs root")


@pytest.mark.parametrize(
    ("kind", "words"),
    [
        ("fifo", "a FIFO"),
        ("socket", "a socket"),
        ("folder", "a folder"),
        ("device", "a character device"),
    ],
)
def test_only_regular_files_are_replaced(tmp_path, kind, words):
    node = tmp_path / "node.h5"
    _make_node(node, kind)
    before = os.lstat(node)
    with pytest.raises(InputError, match=rf"node\.h5: is {words}"):
        write_result(result(1), node, force=True)
    after = os.lstat(node)
    assert stat.S_IFMT(after.st_mode) == stat.S_IFMT(before.st_mode)
    assert after.st_ino == before.st_ino
    assert sorted(p.name for p in tmp_path.iterdir()) == ["node.h5"]


def test_a_symbolic_link_is_neither_replaced_nor_written_through(tmp_path):
    # The documented choice: probeplan never replaces a link and never writes through one.
    real = tmp_path / "real.h5"
    real.write_bytes(b"keep")
    link = tmp_path / "link.h5"
    link.symlink_to(real)
    for force in (False, True):
        with pytest.raises(InputError, match=r"link\.h5: is a symbolic link; .*name the file"):
            write_result(result(2), link, force=force)
    assert link.is_symlink() and real.read_bytes() == b"keep"
    assert sorted(p.name for p in tmp_path.iterdir()) == ["link.h5", "real.h5"]


def test_a_file_being_read_is_never_the_output(tmp_path):
    config = tmp_path / "site.toml"
    config.write_text("title = 'x'\n")
    with pytest.raises(InputError, match=r"site\.toml: is a file this command reads"):
        check_writable(config, force=True, reading=[config])
    # The same file under another name (a hard link) is the same file.
    alias = tmp_path / "alias.h5"
    os.link(config, alias)
    with pytest.raises(InputError, match="is a file this command reads"):
        check_writable(alias, force=True, reading=[config])


def _racing(target, content: bytes):
    """A `_write` that lets another run create ``target`` while this one writes."""
    real = store_write._write

    def write(f, res):
        real(f, res)
        target.write_bytes(content)

    return write


def test_a_file_that_appears_while_writing_is_never_replaced(tmp_path, monkeypatch):
    target = tmp_path / "r.h5"
    monkeypatch.setattr(store_write, "_write", _racing(target, b"another run's result"))
    with pytest.raises(InputError, match=r"r\.h5 exists; pass --force to overwrite it"):
        write_result(result(3), target)
    assert target.read_bytes() == b"another run's result"
    assert sorted(p.name for p in tmp_path.iterdir()) == ["r.h5"]


def test_a_default_name_taken_meanwhile_moves_on_to_the_next(tmp_path, monkeypatch):
    names = free_names("site", tmp_path)
    first = next(names)
    assert first == tmp_path / "site.h5"
    monkeypatch.setattr(store_write, "_write", _racing(first, b"the other run"))
    r = result(4)
    written = write_result(r, first, names=names)
    monkeypatch.undo()
    assert written == tmp_path / "site-2.h5"
    assert first.read_bytes() == b"the other run"
    assert_results_equal(r, read_result(written))
    assert sorted(p.name for p in tmp_path.iterdir()) == ["site-2.h5", "site.h5"]


def test_force_replaces_a_regular_file_whole(tmp_path):
    target = tmp_path / "r.h5"
    target.write_bytes(b"old")
    r = result(5)
    write_result(r, target, force=True)
    assert_results_equal(r, read_result(target))


@pytest.mark.parametrize("code", [errno.ENOSPC, errno.EROFS, errno.EDQUOT])
def test_a_failed_write_is_named_and_leaves_nothing(tmp_path, monkeypatch, code):
    def fail(f, res):
        f.create_dataset("half", data=np.zeros(1000))
        raise OSError(code, os.strerror(code))

    monkeypatch.setattr(store_write, "_write", fail)
    reason = os.strerror(code)
    with pytest.raises(InputError, match=rf"r\.h5: cannot write the result file \({reason}"):
        write_result(result(6), tmp_path / "r.h5")
    assert list(tmp_path.iterdir()) == []


def test_a_failed_overwrite_keeps_the_old_file(tmp_path, monkeypatch):
    target = tmp_path / "r.h5"
    r = result(7)
    write_result(r, target)

    def fail(f, res):
        raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC))

    monkeypatch.setattr(store_write, "_write", fail)
    with pytest.raises(InputError, match="No space left on device"):
        write_result(r, target, force=True)
    assert_results_equal(r, read_result(target))
    assert sorted(p.name for p in tmp_path.iterdir()) == ["r.h5"]


def test_a_folder_that_cannot_be_written_in_is_named(tmp_path, monkeypatch):
    # A read-only mount as root refuses what permission bits would not: the probe is real.
    def read_only(target):
        raise OSError(errno.EROFS, os.strerror(errno.EROFS))

    monkeypatch.setattr(store_files, "_claim_temporary", read_only)
    with pytest.raises(InputError, match=r"r\.h5: cannot write in the folder .*Read-only file"):
        check_writable(tmp_path / "r.h5")
    with pytest.raises(InputError, match="nothing was written; copy the file to a folder"):
        check_writable(tmp_path / "r.h5", force=True, option=None)


@pytest.mark.skipif(os.geteuid() == 0, reason="root writes in read-only folders")
def test_a_read_only_folder_is_named(tmp_path):
    folder = tmp_path / "ro"
    folder.mkdir()
    folder.chmod(0o500)
    try:
        with pytest.raises(InputError, match=r"r\.h5: cannot write in the folder"):
            write_result(result(8), folder / "r.h5")
        assert list(folder.iterdir()) == []
    finally:
        folder.chmod(0o700)


def test_new_files_follow_the_umask(tmp_path):
    # A temporary made with 0600 and renamed would leave the result unreadable to others.
    old = os.umask(0o022)
    try:
        path = write_result(result(9), tmp_path / "r.h5")
    finally:
        os.umask(old)
    assert stat.S_IMODE(os.stat(path).st_mode) == 0o644


def test_without_hard_links_the_name_is_still_claimed_exclusively(tmp_path, monkeypatch):
    # Some file systems (FAT, some network shares) have no hard links: os.link fails with
    # EPERM there, and the final name is then created exclusively before the file is renamed.
    def no_links(src, dst):
        raise OSError(errno.EPERM, os.strerror(errno.EPERM))

    monkeypatch.setattr(os, "link", no_links)
    r = result(10)
    assert_results_equal(r, read_result(write_result(r, tmp_path / "a.h5")))
    taken = tmp_path / "b.h5"
    monkeypatch.setattr(store_write, "_write", _racing(taken, b"another run's result"))
    with pytest.raises(InputError, match=r"b\.h5 exists"):
        write_result(r, taken)
    assert taken.read_bytes() == b"another run's result"
    assert sorted(p.name for p in tmp_path.iterdir()) == ["a.h5", "b.h5"]
