"""What a field meter reads: its axes, gain, noise and range.

A meter reads the field along one or three axes, multiplied by its gain (a meter on a mast or
near a structure sees an enhanced field and is calibrated against a flush ground meter — common
practice). Each reading m has Gaussian noise of variance σ² = σ_add² + (σ_rel·m)², the additive
floor and the proportional part of the meter's grade. A reading whose magnitude exceeds the
meter's range saturates and carries no information.

The Fisher stage wants *whitened rows*: each reading's gradient ∂m/∂θ divided by its σ, zero for
a saturated reading or an unused axis, so that J = Σ rows rowsᵀ. Where the covariance depends on
θ through the proportional part, the contract fixes Σ at the scenario's own readings (the extra
½ tr(Σ⁻¹∂Σ Σ⁻¹∂Σ) term of the exact Gaussian Fisher information is left out, which errs on the
side of a looser bound).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

COMPONENTS: tuple[str, ...] = ("x", "y", "z", "vector")


def component_axes(component) -> np.ndarray:
    """Measurement axes of a component name or unit vector.

    Parameters
    ----------
    component : {"x", "y", "z", "vector"} or (3,) float
        One field component, all three ("vector", a 3-axis meter) or an arbitrary axis.

    Returns
    -------
    (n_axes, 3) float
        Unit vectors, one row per reading of the meter (1 or 3 rows).
    """
    if isinstance(component, str):
        if component not in COMPONENTS:
            raise ValueError(
                f"`component` must be one of {', '.join(COMPONENTS)} or a unit vector; "
                f"got {component!r}."
            )
        if component == "vector":
            return np.eye(3)
        return np.eye(3)[None, "xyz".index(component)]
    axis = np.asarray(component, dtype=float)
    norm = np.linalg.norm(axis) if axis.shape == (3,) else 0.0
    if axis.shape != (3,) or not np.isfinite(norm) or norm == 0.0:
        raise ValueError(
            f"`component` as a vector must be 3 finite numbers, not all 0; got {axis}."
        )
    return (axis / norm)[None, :]


def axes_table(components) -> np.ndarray:
    """Stack per-probe axes into one padded table.

    Parameters
    ----------
    components : sequence of component names or vectors, one per probe

    Returns
    -------
    (n_probes, n_axes, 3) float
        n_axes is 3 if any probe is a 3-axis meter, else 1; unused axes are zero rows, which
        give zero readings and zero information.
    """
    per = [component_axes(c) for c in components]
    width = max((a.shape[0] for a in per), default=1)
    out = np.zeros((len(per), width, 3))
    for i, a in enumerate(per):
        out[i, : a.shape[0]] = a
    return out


@dataclass(frozen=True)
class Noise:
    """A meter grade's noise and range.

    Parameters
    ----------
    noise_v_per_m : float
        1-sigma additive noise of one reading, V/m, > 0.
    relative_noise : float
        1-sigma proportional error, a fraction of the reading, >= 0.
    range_v_per_m : float
        Full-scale range, V/m; a reading beyond it saturates (inf: never).
    """

    noise_v_per_m: float
    relative_noise: float = 0.0
    range_v_per_m: float = float("inf")

    def __post_init__(self) -> None:
        if not (np.isfinite(self.noise_v_per_m) and self.noise_v_per_m > 0):
            raise ValueError(f"`noise_v_per_m` must be > 0 and finite; got {self.noise_v_per_m}.")
        if not (np.isfinite(self.relative_noise) and self.relative_noise >= 0):
            raise ValueError(
                f"`relative_noise` must be >= 0 and finite; got {self.relative_noise}."
            )
        if not self.range_v_per_m > 0:
            raise ValueError(f"`range_v_per_m` must be > 0; got {self.range_v_per_m}.")

    def sigma(self, readings_v_per_m: np.ndarray) -> np.ndarray:
        """1-sigma noise of each reading, V/m, same shape as ``readings_v_per_m``."""
        return np.hypot(self.noise_v_per_m, self.relative_noise * readings_v_per_m)


def readings(field_v_per_m: np.ndarray, axes: np.ndarray, gain: np.ndarray) -> np.ndarray:
    """Noise-free readings of meters.

    Parameters
    ----------
    field_v_per_m : (..., n_probes, 3) float
        The field at each probe.
    axes : (n_probes, n_axes, 3) float
        Each probe's measurement axes (zero rows for unused ones).
    gain : (n_probes,) or (..., n_probes) float
        Calibration factor of each probe.

    Returns
    -------
    (..., n_probes, n_axes) float
        gain × (axis · E), V/m.
    """
    return np.einsum("...ni,nai->...na", field_v_per_m, axes) * np.asarray(gain)[..., None]


def whitened_rows(
    field_v_per_m: np.ndarray,
    jacobian: np.ndarray,
    axes: np.ndarray,
    gain: np.ndarray,
    noise: Noise,
) -> tuple[np.ndarray, np.ndarray]:
    """Gradients of every reading divided by its noise, zero where saturated.

    Parameters
    ----------
    field_v_per_m : (..., n_probes, 3) float
        The field at each probe (… is any batch shape, e.g. (n_scenarios,)).
    jacobian : (..., n_probes, 3, n_params) float
        ∂E/∂θ at each probe.
    axes : (n_probes, n_axes, 3) float
    gain : (n_probes,) or (..., n_probes) float
    noise : Noise

    Returns
    -------
    rows : (..., n_probes, n_axes, n_params) float
        (∂m/∂θ)/σ per reading, in 1/(unit of θ); the Fisher information is Σ rows rowsᵀ.
    saturated : (..., n_probes, n_axes) bool
        Readings beyond the meter's range (their rows are zero).
    """
    g = np.asarray(gain)[..., None, None]
    k = _shared_coordinate_axis(axes)
    if k is None:
        m = readings(field_v_per_m, axes, gain)
        projected = np.einsum("...nip,nai->...nap", jacobian, axes)
    else:
        # Every meter reads the same coordinate axis: a slice gives exactly what the
        # projection would (the other terms are zeros) at a third of the memory traffic.
        m = field_v_per_m[..., k : k + 1] * np.asarray(gain)[..., None]
        projected = jacobian[..., k : k + 1, :]
    saturated = np.abs(m) > noise.range_v_per_m
    scale = np.where(saturated, 0.0, 1.0 / noise.sigma(m))
    rows = projected * (g * scale[..., None])
    return rows, saturated


def _shared_coordinate_axis(axes: np.ndarray) -> int | None:
    """Index k when every probe reads the single axis e_k (``axes`` (n, 1, 3)), else None."""
    if axes.shape[0] == 0 or axes.shape[1] != 1:
        return None
    first = axes[0, 0]
    k = int(np.argmax(np.abs(first)))
    if first[k] != 1.0 or np.count_nonzero(first) != 1:
        return None
    if axes.strides[0] != 0 and not np.array_equal(axes, np.broadcast_to(first, axes.shape)):
        return None
    return k


def draw_readings(
    clean_v_per_m: np.ndarray, noise: Noise, rng: np.random.Generator
) -> tuple[np.ndarray, np.ndarray]:
    """Noisy readings as a meter would report them.

    Parameters
    ----------
    clean_v_per_m : (...,) float
        Noise-free readings.
    noise : Noise
    rng : numpy Generator

    Returns
    -------
    noisy : (...,) float
        Readings plus Gaussian noise, clipped to ± range.
    saturated : (...,) bool
        Readings at the end of the range (a fit should drop them).
    """
    noisy = clean_v_per_m + rng.standard_normal(clean_v_per_m.shape) * noise.sigma(clean_v_per_m)
    saturated = np.abs(noisy) >= noise.range_v_per_m
    return np.clip(noisy, -noise.range_v_per_m, noise.range_v_per_m), saturated
