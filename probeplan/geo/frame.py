"""The geographic frame: WGS84 longitude, latitude and height to the local metre frame and back.

The local frame is east-north-up at the origin: x east, y north, z up, in metres. Horizontally
it is the ellipsoidal azimuthal equidistant projection centred on the origin, computed by
pyproj (PROJ's ``aeqd`` on the WGS84 ellipsoid, which uses Karney's geodesics: C. F. F. Karney,
Algorithms for geodesics, J. Geodesy 87, 43-55, 2013); vertically z is the height above the
WGS84 ellipsoid minus the origin's height.

Why this projection and not the topocentric (ECEF-rotated) east-north-up conversion: the forward
model puts a flat grounded plane at z = 0 under the whole site. The topocentric frame is a
rigid rotation of Earth-centred coordinates, so the curved ground falls below its tangent plane
by about d²/(2R): 7.8 m at 10 km, 0.8 m at 3 km. A meter 1 m above the ground 10 km out would
sit 6.8 m below the model's ground. Here the height stays the height, so the ground stays at
z = 0 everywhere, as the flat-ground model assumes; distances and azimuths from the origin are
exact geodesic ones, and the only distortion is the map scale across the radius, which grows as
ρ²/(6R²) at distance ρ from the origin (Snyder, Map Projections: A Working Manual, USGS PP 1395,
1987, the azimuthal equidistant projection). :meth:`Frame.distortion` measures it for a site.

Points farther than :data:`ACCURACY_RADIUS_M` from the origin are refused: there the scale error
would pass 1e-4 (1 cm in 100 m) and a flat site stops being a fair picture of the ground.
"""

from __future__ import annotations

import math
import numbers
from dataclasses import dataclass
from functools import lru_cache

import numpy as np

from ..errors import InputError

#: Horizontal distance from the origin within which the frame is stated accurate, m. At this
#: radius the azimuthal equidistant scale error is 9.2e-5 (below 1e-4); beyond it points are
#: refused.
ACCURACY_RADIUS_M = 150_000.0

#: The scale error the frame promises within :data:`ACCURACY_RADIUS_M`.
ACCURACY_SCALE_ERROR = 1e-4

#: WGS84 ellipsoid: semi-major axis (m) and inverse flattening, as defined (NIMA TR8350.2).
WGS84_A_M = 6_378_137.0
WGS84_INV_F = 298.257223563
#: Mean radius R1 = (2a + b)/3 of the WGS84 ellipsoid, m (the IUGG mean radius).
MEAN_RADIUS_M = (2.0 * WGS84_A_M + WGS84_A_M * (1.0 - 1.0 / WGS84_INV_F)) / 3.0

# Azimuths at which the site's bounding circle is sampled for the scale error.
_RING_SAMPLES = 72


@lru_cache(maxsize=16)
def _projection(lon0_deg: float, lat0_deg: float):
    """The pyproj projection of a frame; imported here so configs without a frame never
    pay for loading pyproj."""
    import pyproj

    return pyproj.Proj(proj="aeqd", lon_0=lon0_deg, lat_0=lat0_deg, ellps="WGS84", units="m")


@dataclass(frozen=True)
class Distortion:
    """How far the flat local frame is from the ellipsoid over a site.

    Attributes
    ----------
    radius_m : float
        The site's largest horizontal distance from the origin, m.
    scale_error : float
        Largest relative length error of the map at that radius (Tissot's indicatrix from
        PROJ, whose numerical derivatives resolve about 2e-8), 1.
    distance_error_m : float
        Bound on the error of any horizontal distance within the site: ``scale_error`` times
        the site's horizontal span, m.
    ground_drop_m : float
        How far the curved ground falls below a flat plane through the origin at ``radius_m``,
        d²/(2R), m. The forward model's ground is flat; this says what it leaves out.
    """

    radius_m: float
    scale_error: float
    distance_error_m: float
    ground_drop_m: float


@dataclass(frozen=True)
class Frame:
    """A WGS84 origin and its local east-north-up frame in metres.

    Parameters
    ----------
    origin_lon_deg : float
        Longitude of the origin, degrees east, in [-180, 180].
    origin_lat_deg : float
        Latitude of the origin, degrees north, in (-90, 90): on a pole east and north have no
        meaning.
    origin_height_m : float
        Height of the origin above the WGS84 ellipsoid, m; local z = 0 there.

    Raises
    ------
    InputError
        A value that is not a finite number or out of range.
    """

    origin_lon_deg: float
    origin_lat_deg: float
    origin_height_m: float = 0.0

    def __post_init__(self) -> None:
        for key in ("origin_lon_deg", "origin_lat_deg", "origin_height_m"):
            value = getattr(self, key)
            if isinstance(value, bool) or not isinstance(value, numbers.Real):
                raise InputError(f"frame `{key}` must be a number; got {value!r}.")
            if not math.isfinite(value):
                raise InputError(f"frame `{key}` must be a finite number; got {value!r}.")
            object.__setattr__(self, key, float(value))
        if not -180.0 <= self.origin_lon_deg <= 180.0:
            raise InputError(
                f"frame `origin_lon_deg` must be in [-180, 180] degrees east; got "
                f"{self.origin_lon_deg!r}."
            )
        if not -90.0 < self.origin_lat_deg < 90.0:
            raise InputError(
                f"frame `origin_lat_deg` must be between -90 and 90 degrees north (a pole has no "
                f"east or north); got {self.origin_lat_deg!r}."
            )

    # ------------------------------------------------------------------ conversions
    def to_local(self, lon_deg, lat_deg, height_m=None, *, what: str = "point") -> np.ndarray:
        """Longitude, latitude and height to local metres.

        Parameters
        ----------
        lon_deg, lat_deg : (n_points,) float
            WGS84 longitude in [-180, 180] and latitude in [-90, 90], degrees.
        height_m : (n_points,) float or None
            Height above the WGS84 ellipsoid, m; None puts the points at the origin's height.
        what : str
            What the points are, for messages (``"point"`` gives "point 3 ...").

        Returns
        -------
        (n_points, 3) float
            x east, y north, z up, m.

        Raises
        ------
        InputError
            A coordinate that is not finite or out of range, or a point farther than
            :data:`ACCURACY_RADIUS_M` from the origin.
        """
        lon, lat, h = self._arrays(lon_deg, lat_deg, height_m)
        problem = self.check_lonlat(lon, lat, h)
        if problem is not None:
            k, reason = problem
            raise InputError(
                f"{what} {k} (lon, lat) = ({float(lon[k])!r}, {float(lat[k])!r}): {reason}."
            )
        return self._to_local(lon, lat, h)

    def to_lonlat(self, points_m) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """Local metres to longitude, latitude and height.

        Parameters
        ----------
        points_m : (n_points, 3) float
            x east, y north, z up, m.

        Returns
        -------
        lon_deg, lat_deg : (n_points,) float
            WGS84 longitude in [-180, 180] and latitude, degrees.
        height_m : (n_points,) float
            Height above the WGS84 ellipsoid, m.

        Raises
        ------
        InputError
            A point that is not finite or is farther than :data:`ACCURACY_RADIUS_M` from the
            origin.
        """
        p = np.asarray(points_m, dtype=float)
        if p.ndim != 2 or p.shape[1] != 3:
            raise InputError(f"points_m must have shape (n_points, 3); got {p.shape}.")
        bad = ~np.isfinite(p).all(axis=1)
        if bad.any():
            k = int(np.flatnonzero(bad)[0])
            raise InputError(f"point {k} = {p[k].tolist()} is not finite.")
        far = np.flatnonzero(np.hypot(p[:, 0], p[:, 1]) > ACCURACY_RADIUS_M)
        if far.size:
            k = int(far[0])
            raise InputError(
                f"point {k} = {p[k].tolist()} m is {self._km(np.hypot(*p[k, :2]))} from the frame "
                f"origin; {self._allowed()}."
            )
        return self._to_lonlat(p)

    def check_lonlat(self, lon_deg, lat_deg, height_m=None) -> tuple[int, str] | None:
        """The first point that cannot be converted, and why; None if all can.

        Parameters
        ----------
        lon_deg, lat_deg, height_m : (n_points,) float
            As for :meth:`to_local`.

        Returns
        -------
        (int, str) or None
            The point's index and a reason that completes a sentence ("latitude 95.0 is
            beyond ±90 degrees"), for the caller to name the file and feature.
        """
        lon, lat, h = self._arrays(lon_deg, lat_deg, height_m)
        finite = np.isfinite(lon) & np.isfinite(lat) & np.isfinite(h)
        checks = (
            (~finite, lambda k: "a coordinate is not a finite number"),
            (
                finite & (np.abs(lat) > 90.0),
                lambda k: f"latitude {float(lat[k])!r} is beyond ±90 degrees",
            ),
            (
                finite & (np.abs(lon) > 180.0),
                lambda k: f"longitude {float(lon[k])!r} is beyond ±180 degrees",
            ),
        )
        for bad, reason in checks:
            if bad.any():
                k = int(np.flatnonzero(bad)[0])
                return k, reason(k)
        radius = self._geodesic_radius(lon, lat)
        far = np.flatnonzero(radius > ACCURACY_RADIUS_M)
        if far.size:
            k = int(far[0])
            return k, f"it is {self._km(radius[k])} from the frame origin; {self._allowed()}"
        return None

    # ------------------------------------------------------------------ distortion
    def distortion(self, points_m) -> Distortion:
        """The frame's distortion over a site.

        Parameters
        ----------
        points_m : (n_points, 2) or (n_points, 3) float
            Points spanning the site (region outlines, meters), m; only x and y are used.

        Returns
        -------
        Distortion
        """
        p = np.asarray(points_m, dtype=float).reshape(-1, np.shape(points_m)[-1])[:, :2]
        radius = float(np.hypot(p[:, 0], p[:, 1]).max()) if len(p) else 0.0
        span = float(np.hypot(*np.ptp(p, axis=0))) if len(p) else 0.0
        scale = self._scale_error(min(radius, ACCURACY_RADIUS_M))
        return Distortion(
            radius_m=radius,
            scale_error=scale,
            distance_error_m=scale * span,
            ground_drop_m=radius**2 / (2.0 * MEAN_RADIUS_M),
        )

    def _scale_error(self, radius_m: float) -> float:
        """Largest |scale − 1| on the circle of ``radius_m`` around the origin; the azimuthal
        equidistant scale error grows with the radius, so this bounds it inside the circle."""
        if radius_m <= 0.0:
            return 0.0
        az = np.linspace(0.0, 2.0 * np.pi, _RING_SAMPLES, endpoint=False)
        ring = np.column_stack([radius_m * np.sin(az), radius_m * np.cos(az), np.zeros_like(az)])
        lon, lat, _ = self._to_lonlat(ring)
        f = _projection(self.origin_lon_deg, self.origin_lat_deg).get_factors(lon, lat)
        big = np.asarray(f.tissot_semimajor) - 1.0
        small = 1.0 - np.asarray(f.tissot_semiminor)
        return float(max(big.max(), small.max(), 0.0))

    # ------------------------------------------------------------------ kernels
    def _to_local(self, lon: np.ndarray, lat: np.ndarray, h: np.ndarray) -> np.ndarray:
        x, y = _projection(self.origin_lon_deg, self.origin_lat_deg)(lon, lat)
        return np.column_stack([x, y, h - self.origin_height_m])

    def _to_lonlat(self, p: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        proj = _projection(self.origin_lon_deg, self.origin_lat_deg)
        lon, lat = proj(p[:, 0], p[:, 1], inverse=True)
        return np.asarray(lon, float), np.asarray(lat, float), p[:, 2] + self.origin_height_m

    def _geodesic_radius(self, lon: np.ndarray, lat: np.ndarray) -> np.ndarray:
        """Geodesic distance from the origin, m: the projection's radius, exact in aeqd."""
        x, y = _projection(self.origin_lon_deg, self.origin_lat_deg)(lon, lat)
        r = np.hypot(x, y)
        # PROJ gives inf for the antipode; anything unconvertible is "far".
        return np.where(np.isfinite(r), r, np.inf)

    def _arrays(self, lon_deg, lat_deg, height_m):
        lon = np.atleast_1d(np.asarray(lon_deg, dtype=float))
        lat = np.atleast_1d(np.asarray(lat_deg, dtype=float))
        h = (
            np.full(lon.shape, self.origin_height_m)
            if height_m is None
            else np.atleast_1d(np.asarray(height_m, dtype=float))
        )
        if lon.ndim != 1 or lon.shape != lat.shape or lon.shape != h.shape:
            raise InputError(
                f"lon_deg, lat_deg and height_m must be 1-D arrays of one length; got shapes "
                f"{lon.shape}, {lat.shape}, {h.shape}."
            )
        return lon, lat, h

    def _km(self, distance_m: float) -> str:
        return f"{distance_m / 1000.0:.1f} km"

    def _allowed(self) -> str:
        return (
            f"the frame at (lon, lat) = ({self.origin_lon_deg!r}, {self.origin_lat_deg!r}) is "
            f"stated accurate within {ACCURACY_RADIUS_M / 1000.0:.0f} km of its origin; move the "
            "origin nearer the site"
        )

    def describe(self) -> str:
        """One line for people: the origin and the datum."""
        return (
            f"WGS84, east-north-up at lon {self.origin_lon_deg:.7f}°, lat "
            f"{self.origin_lat_deg:.7f}°, height {self.origin_height_m:g} m (azimuthal "
            "equidistant)"
        )


# --------------------------------------------------------------------------------------------
# Rounding for people
# --------------------------------------------------------------------------------------------

#: Sites whose extent is below this get millimetres; larger ones centimetres, m.
SMALL_SITE_M = 100.0


@dataclass(frozen=True)
class Rounding:
    """How many decimals positions get for people (installers, GNSS receivers).

    Attributes
    ----------
    decimals_m : int
        Decimals of metre coordinates: 2 (cm) outdoors, 3 (mm) for sites under 100 m.
    decimals_deg : int
        Decimals of longitude and latitude at about the same resolution: 1e-7 degree of
        latitude is 1.1 cm, so 7 for cm and 8 for mm.
    """

    decimals_m: int
    decimals_deg: int

    def metres(self, values_m) -> np.ndarray:
        """``values_m`` (any shape, m) rounded; negative zeros made plain zeros."""
        return np.round(np.asarray(values_m, dtype=float), self.decimals_m) + 0.0

    def degrees(self, values_deg) -> np.ndarray:
        """``values_deg`` (any shape, degrees) rounded; negative zeros made plain zeros."""
        return np.round(np.asarray(values_deg, dtype=float), self.decimals_deg) + 0.0


def rounding_for(extent_m: float) -> Rounding:
    """The rounding for a site of a given horizontal extent.

    Parameters
    ----------
    extent_m : float
        The site's largest horizontal dimension (the longer side of its bounding box), m.

    Returns
    -------
    Rounding
        Millimetres below :data:`SMALL_SITE_M`, centimetres otherwise.
    """
    small = float(extent_m) < SMALL_SITE_M
    return Rounding(decimals_m=3 if small else 2, decimals_deg=8 if small else 7)


def site_extent_m(points_m) -> float:
    """The longer side of the horizontal bounding box of ``points_m`` ((n_points, 2 or 3), m)."""
    p = np.asarray(points_m, dtype=float)
    if p.size == 0:
        return 0.0
    return float(np.ptp(p.reshape(-1, p.shape[-1])[:, :2], axis=0).max())
