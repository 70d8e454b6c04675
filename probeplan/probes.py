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
    return pad_axes([component_axes(c) for c in components])


def pad_axes(axes) -> np.ndarray:
    """Stack per-probe axes ``(n_axes_i, 3)`` into one ``(n_probes, n_axes, 3)`` table, padding
    the narrower meters with zero rows (zero readings, zero information)."""
    width = max((a.shape[0] for a in axes), default=1)
    out = np.zeros((len(axes), width, 3))
    for i, a in enumerate(axes):  # once per layout, a handful of meters
        out[i, : a.shape[0]] = a
    return out


def _in_quadrature(a, b) -> np.ndarray:
    """sqrt(a² + b²), broadcast, as numpy's ``hypot`` gives it. ``hypot`` guards against
    overflow at about 15 ns an element, a third of the meter model's time when scoring layouts;
    the squares are used unless they overflowed or underflowed somewhere (noise figures or
    readings beyond 1e154 or below 1e-154 V/m: never for a real meter), where ``hypot`` is."""
    with np.errstate(over="ignore", under="ignore"):  # (then hypot, below)
        out = np.sqrt(np.square(a) + np.square(b))
    if out.size and not (0.0 < out.min() and out.max() < np.inf):
        return np.hypot(a, b)
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
        return _in_quadrature(self.noise_v_per_m, self.relative_noise * readings_v_per_m)


@dataclass(frozen=True, eq=False)
class Meters:
    """Every meter of a layout, installed ones first, each with its own axes, gain and grade.

    It stands wherever a :class:`Noise` does (``sigma``, ``range_v_per_m``), per meter: its noise
    columns broadcast against readings ``(..., n_probes, n_axes)``.

    Attributes
    ----------
    positions_m : (n_probes, 3) float
    axes : (n_probes, n_axes, 3) float
        Unit measurement axes; zero rows for the unused axes of narrower meters.
    gain : (n_probes,) float
    installed : (n_probes,) bool
    noise_v_per_m, relative_noise, range_v_per_m : (n_probes, 1) float
        Each meter's grade.
    grade : tuple of n_probes str
        The grade's name; "" for the noise of the ``[probes]`` table itself.
    """

    positions_m: np.ndarray
    axes: np.ndarray
    gain: np.ndarray
    installed: np.ndarray
    noise_v_per_m: np.ndarray
    relative_noise: np.ndarray
    range_v_per_m: np.ndarray
    grade: tuple[str, ...]

    @property
    def used(self) -> np.ndarray:
        """(n_probes, n_axes) bool: which axes are real readings."""
        return np.linalg.norm(self.axes, axis=-1) > 0.0

    def sigma(self, readings_v_per_m: np.ndarray) -> np.ndarray:
        """1-sigma noise of readings ``(..., n_probes, n_axes)``, V/m."""
        return _in_quadrature(self.noise_v_per_m, self.relative_noise * readings_v_per_m)

    def take(self, index) -> Meters:
        """The meters at ``index`` (a boolean mask or integer indices, repeats allowed)."""
        idx = np.arange(self.gain.shape[0])[index]
        return Meters(
            positions_m=self.positions_m[idx],
            axes=self.axes[idx],
            gain=self.gain[idx],
            installed=self.installed[idx],
            noise_v_per_m=self.noise_v_per_m[idx],
            relative_noise=self.relative_noise[idx],
            range_v_per_m=self.range_v_per_m[idx],
            grade=tuple(self.grade[i] for i in idx),
        )


def stack_meters(
    positions_m: np.ndarray,
    axes,
    gain: np.ndarray,
    installed: np.ndarray,
    grades: list[tuple[str, Noise]],
) -> Meters:
    """Assemble :class:`Meters` from per-meter parts.

    Parameters
    ----------
    positions_m : (n_probes, 3) float
    axes : sequence of n_probes (n_axes_i, 3) float
        Each meter's axes (see :func:`pad_axes`).
    gain : (n_probes,) float
    installed : (n_probes,) bool
    grades : list of n_probes (name, Noise)
    """

    def column(attr: str) -> np.ndarray:
        return np.array([getattr(g, attr) for _, g in grades], dtype=float).reshape(-1, 1)

    return Meters(
        positions_m=np.asarray(positions_m, dtype=float).reshape(-1, 3),
        axes=pad_axes(axes),
        gain=np.asarray(gain, dtype=float).reshape(-1),
        installed=np.asarray(installed, dtype=bool).reshape(-1),
        noise_v_per_m=column("noise_v_per_m"),
        relative_noise=column("relative_noise"),
        range_v_per_m=column("range_v_per_m"),
        grade=tuple(name for name, _ in grades),
    )


def component_of(axes: np.ndarray):
    """The component spec (as a config writes it) of one meter's axes: ``"x"``, ``"y"``,
    ``"z"``, ``"vector"`` or its unit axis as a (3,) tuple; inverse of :func:`component_axes`.

    Parameters
    ----------
    axes : (n_axes, 3) float
        One meter's axes (zero rows ignored): three coordinate axes or a single unit axis.
    """
    rows = axes[np.linalg.norm(axes, axis=-1) > 0.0]
    if rows.shape[0] == 3 and np.allclose(np.abs(rows), np.eye(3), atol=1e-12):
        return "vector"
    if rows.shape[0] != 1:
        raise ValueError(f"a meter reads one axis or all three; got axes {rows.tolist()}.")
    for k, name in enumerate("xyz"):
        if np.allclose(rows[0], np.eye(3)[k], atol=1e-12):
            return name
    return tuple(float(a) for a in rows[0])


def axes_label(axes: np.ndarray) -> str:
    """What one meter reads, in words: ``"x"``, ``"y"``, ``"z"``, ``"vector"`` or its axis.

    Parameters
    ----------
    axes : (n_axes, 3) float
        One meter's axes (zero rows ignored).
    """
    comp = component_of(axes)
    return comp if isinstance(comp, str) else "[" + ", ".join(f"{a:.4g}" for a in comp) + "]"


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


def reading_weights(
    field_v_per_m: np.ndarray,
    axes: np.ndarray,
    gain: np.ndarray,
    noise: Noise | Meters,
) -> tuple[np.ndarray, np.ndarray]:
    """What turns a field gradient into a whitened reading row: gain / σ, zero where saturated.

    Parameters
    ----------
    field_v_per_m : (..., n_probes, 3) float
        The field at each probe (… is any batch shape, e.g. (n_scenarios,)).
    axes : (n_probes, n_axes, 3) float
    gain : (n_probes,) or (..., n_probes) float
    noise : Noise or Meters
        One grade for every probe, or each probe's own (:class:`Meters` of these probes).

    Returns
    -------
    weights : (..., n_probes, n_axes) float
        gain / σ of each reading, in 1/(V/m), 0 for saturated readings: the reading's row is
        ``weight × (axis · ∂E/∂θ)``.
    saturated : (..., n_probes, n_axes) bool
        Readings beyond the meter's range.
    """
    k = _shared_coordinate_axis(axes)
    if k is None:
        m = readings(field_v_per_m, axes, gain)
    else:
        # Every meter reads the same coordinate axis: a slice gives exactly what the
        # projection would (the other terms are zeros) at a third of the memory traffic.
        m = field_v_per_m[..., k : k + 1] * np.asarray(gain)[..., None]
    saturated = np.abs(m) > noise.range_v_per_m
    weights = np.asarray(gain)[..., None] * np.where(saturated, 0.0, 1.0 / noise.sigma(m))
    return weights, saturated


def whitened_rows(
    field_v_per_m: np.ndarray,
    jacobian: np.ndarray,
    axes: np.ndarray,
    gain: np.ndarray,
    noise: Noise | Meters,
) -> tuple[np.ndarray, np.ndarray]:
    """Gradients of every reading divided by its noise, zero where saturated.

    Parameters
    ----------
    jacobian : (..., n_probes, 3, n_params) float
        ∂E/∂θ at each probe.
    field_v_per_m, axes, gain, noise
        As for :func:`reading_weights`.

    Returns
    -------
    rows : (..., n_probes, n_axes, n_params) float
        (∂m/∂θ)/σ per reading, in 1/(unit of θ); the Fisher information is Σ rows rowsᵀ.
    saturated : (..., n_probes, n_axes) bool
        Readings beyond the meter's range (their rows are zero).
    """
    weights, saturated = reading_weights(field_v_per_m, axes, gain, noise)
    k = _shared_coordinate_axis(axes)
    if k is None:
        projected = np.einsum("...nip,nai->...nap", jacobian, axes)
    else:
        projected = jacobian[..., k : k + 1, :]
    return projected * weights[..., None], saturated


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
