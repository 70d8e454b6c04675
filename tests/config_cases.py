"""The config text and helpers the config tests share (a fictional site, invented numbers).

Exact-message tests edit one line of :data:`BASE` and check the pieces the one
:class:`InputError` message must carry.
"""

from __future__ import annotations

import pytest

from probeplan.config import load_config
from probeplan.errors import InputError

# The smallest valid config; the bad-input cases edit one line of it.
BASE = """
title = "Fictional test range"
seed = 3

[ground]
z_m = 0.0

[probes]
count = 4
component = "z"
noise_v_per_m = 20.0

[[region]]
kind = "rectangle"
min_m = [-500.0, -500.0]
max_m = [500.0, 500.0]
z_m = 1.0

[[source]]
kind = "point"
charge_c = -20.0
center_m = [0.0, 0.0, 7000.0]
estimate = ["charge", "x", "y", "z"]
"""

SOURCE_POINT = 'kind = "point"\ncharge_c = -20.0\ncenter_m = [0.0, 0.0, 7000.0]'
EST = 'estimate = ["charge", "x", "y", "z"]'
RECT = 'kind = "rectangle"\nmin_m = [-500.0, -500.0]\nmax_m = [500.0, 500.0]\nz_m = 1.0'


def write(tmp_path, text: str, name: str = "cfg.toml"):
    path = tmp_path / name
    path.write_text(text, encoding="utf-8")
    return path


def edited(old: str, new: str, text: str = BASE) -> str:
    assert old in text, old
    return text.replace(old, new, 1)


def message(tmp_path, text: str) -> str:
    """The one InputError message that loading ``text`` from ``cfg.toml`` gives."""
    with pytest.raises(InputError) as info:
        load_config(write(tmp_path, text))
    return str(info.value)


def assert_pieces(msg: str, *pieces: str) -> None:
    for piece in pieces:
        assert piece in msg, f"{piece!r} not in {msg!r}"


def assert_bad_case(tmp_path, edit: tuple[str, str], pieces: list[str]) -> None:
    """``BASE`` with one edit gives one message naming ``cfg.toml`` and carrying ``pieces``."""
    old, new = edit
    msg = message(tmp_path, edited(old, new))
    assert msg.startswith("cfg.toml: ") or msg.startswith(str(tmp_path / "cfg.toml") + ": ")
    assert_pieces(msg, *pieces)
