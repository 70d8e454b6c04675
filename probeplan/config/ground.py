"""``[ground]``: the grounded conducting plane, and the rule that probes mount on or above it."""

from __future__ import annotations

from .reader import Checker, Table

GROUND_KEYS = ("z_m",)


def parse_ground(root: Table) -> float | None:
    ground = root.table("ground")
    if ground is None:
        return None
    ground.check_keys(GROUND_KEYS)
    return ground.number("z_m", what="the height of the conducting plane in metres")


def check_at_or_above_ground(ck: Checker, key: str, z: float, ground_z_m: float | None) -> None:
    if ground_z_m is not None and z < ground_z_m:
        ck.fail(
            f"`{key}` puts a probe at z = {z:g} m, below the ground plane at z = {ground_z_m:g} m "
            "(`ground.z_m`); probes mount on or above the ground."
        )
