"""Ground elevation under the waypoints, and the heights each file format means.

The planner works on the ground plane; an aerial simulator wants heights. Three
heights are kept apart here, because each format defines its own:

- the altitude above ground (``--alt-m``), which the waypoint files carry in a named
  field of their own;
- the elevation above sea level, which is what GPX ``<ele>`` is read as (common
  practice: GPX 1.1 gives ``<geoidheight>`` as the geoid's height above the WGS 84
  ellipsoid "as defined in NMEA GGA", so ``<ele>`` is the height above the geoid);
- the height above the WGS 84 ellipsoid, which RFC 7946 section 4 makes the third
  coordinate of a GeoJSON position.

The ground elevation is either a constant the user gives or a DEM GeoTIFF sampled at
each waypoint (rasterio, in the ``gis`` extra), always with its vertical datum: a
vertical CRS pyproj knows (``EPSG:5773``, EGM96 height; ``EPSG:3855``, EGM2008
height) or ``ellipsoid`` (WGS 84 ellipsoidal heights). Turning one datum into the
other needs a geoid grid; when PROJ does not have it, the height that needs it is left
out and the reason is said, never filled with an uncorrected value.
"""

from __future__ import annotations

import warnings
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from planner import checks
from planner.errors import SettingsError

#: How ``--vertical-datum`` names WGS 84 ellipsoidal heights.
ELLIPSOID = "ellipsoid"
#: The geoid GPS receivers report sea level against (NMEA GGA; common practice): used
#: to turn ellipsoidal heights into GPX elevations.
SEA_LEVEL_CRS = "EPSG:5773"
#: Ground elevations outside this range (metres) are no place on Earth's land surface.
LOWEST_GROUND_M, HIGHEST_GROUND_M = -500.0, 9000.0


@dataclass(frozen=True)
class Ground:
    """Ground elevation at any lon/lat, and the vertical datum it is given in.

    ``elevation(lon, lat)`` takes arrays of degrees and returns metres; ``datum`` is
    None for WGS 84 ellipsoidal heights or the pyproj vertical CRS; ``described``
    names both in words for the files (``a constant 212.000 m, EGM96 height
    (EPSG:5773)``).
    """

    elevation: Callable
    datum: object | None
    described: str

    @property
    def datum_name(self) -> str:
        """The vertical datum in words: ``EGM96 height (EPSG:5773)`` or ``WGS 84 ellipsoidal height``."""
        return datum_name(self.datum)


def parse_datum(text: str | None, option: str = "parse_datum.text"):
    """``ellipsoid`` as None, else the vertical CRS pyproj resolves ``text`` to."""
    if text is None:
        raise SettingsError(f"{option} is needed with a ground elevation: name the vertical datum its heights are "
                            f"in ({ELLIPSOID} for WGS 84 ellipsoidal heights, or a vertical CRS such as EPSG:5773 "
                            "for EGM96 or EPSG:3855 for EGM2008)")
    if text.strip().lower() == ELLIPSOID:
        return None
    from pyproj import CRS
    from pyproj.exceptions import CRSError

    try:
        crs = CRS.from_user_input(text.strip())
    except CRSError as err:
        raise SettingsError(f"{option} {text!r:.60}: not a vertical CRS pyproj knows; use {ELLIPSOID} or a code "
                            "such as EPSG:5773 (EGM96 height)") from err
    if not crs.is_vertical:
        raise SettingsError(f"{option} {text!r:.60}: {crs.name} is a {crs.type_name}, not a vertical datum; use "
                            f"{ELLIPSOID} or a vertical CRS such as EPSG:5773 (EGM96 height)")
    return crs


def datum_name(datum) -> str:
    """A vertical datum in words (see :attr:`Ground.datum_name`)."""
    if datum is None:
        return "WGS 84 ellipsoidal height"
    code = datum.to_authority()
    return f"{datum.name} ({':'.join(code)})" if code else datum.name


def _check_ground(values: np.ndarray, where: str) -> np.ndarray:
    values = np.asarray(values, float)
    bad = ~np.isfinite(values) | (values < LOWEST_GROUND_M) | (values > HIGHEST_GROUND_M)
    if bad.any():
        raise SettingsError(f"{where}: ground elevation {values[bad][0]!r} m is not between {LOWEST_GROUND_M:g} and "
                            f"{HIGHEST_GROUND_M:g} m")
    return values


def constant_ground(elevation_m: float, datum_text: str | None) -> Ground:
    """A ground elevation the same everywhere (``--ground-elev-m``)."""
    checks.number(elevation_m, "constant_ground.elevation_m", says="a finite number of metres")
    _check_ground(np.array([elevation_m]), "constant_ground.elevation_m")
    datum = parse_datum(datum_text)
    value = float(elevation_m)
    return Ground(elevation=lambda lon, lat: np.full(np.shape(lon), value), datum=datum,
                  described=f"a constant {value:.3f} m, {datum_name(datum)}")


def dem_ground(path, datum_text: str | None) -> Ground:
    """A DEM GeoTIFF sampled at each point (the pixel containing it; rasterio).

    Raises
    ------
    SettingsError
        Without rasterio (naming the extra), for a file rasterio cannot open, a DEM
        without a CRS, and, when sampled, a point outside the DEM or on a nodata pixel.
    """
    try:
        import rasterio
    except ImportError as err:
        raise SettingsError(f"dem_ground.path {path}: reading a GeoTIFF needs the optional GIS extra: "
                            "pip install 'veerwise[gis]'") from err
    from pyproj import CRS, Transformer

    datum = parse_datum(datum_text)
    try:
        with rasterio.open(path) as dem:
            band = dem.read(1, masked=True)
            transform, crs_wkt = dem.transform, dem.crs.to_wkt() if dem.crs else None
            shape = dem.shape
    except rasterio.errors.RasterioError as err:
        raise SettingsError(f"dem_ground.path {path}: not a raster rasterio reads ({str(err).splitlines()[0][:160]})") from err
    if crs_wkt is None:
        raise SettingsError(f"dem_ground.path {path}: the DEM has no coordinate reference system; assign one in the GIS editor")
    to_dem = Transformer.from_crs(CRS.from_epsg(4326), CRS.from_wkt(crs_wkt), always_xy=True)
    values = np.ma.filled(band.astype(float), np.nan)
    name = Path(path).name

    def elevation(lon, lat):
        x, y = to_dem.transform(np.asarray(lon, float), np.asarray(lat, float))
        rows, cols = rasterio.transform.rowcol(transform, np.atleast_1d(x), np.atleast_1d(y))
        rows, cols = np.asarray(rows), np.asarray(cols)
        inside = (rows >= 0) & (rows < shape[0]) & (cols >= 0) & (cols < shape[1])
        lon_a, lat_a = np.atleast_1d(lon), np.atleast_1d(lat)
        if not inside.all():
            k = int(np.flatnonzero(~inside)[0])
            raise SettingsError(f"dem_ground.path {path}: the point at {lat_a[k]:.7f} N, {lon_a[k]:.7f} E lies outside the DEM")
        out = values[rows, cols]
        if np.isnan(out).any():
            k = int(np.flatnonzero(np.isnan(out))[0])
            raise SettingsError(f"dem_ground.path {path}: the point at {lat_a[k]:.7f} N, {lon_a[k]:.7f} E falls on a nodata "
                                "pixel")
        return _check_ground(out, f"dem_ground.path {path}")

    return Ground(elevation=elevation, datum=datum, described=f"sampled from the DEM {name}, {datum_name(datum)}")


def _vertical_transform(src, dst):
    """A pyproj transformer between two 3D CRSs, or the reason none is exact.

    PROJ falls back on a "ballpark" vertical transformation (no geoid correction at
    all) when the geoid grid is missing; that is refused here, naming the grid.
    """
    from pyproj.transformer import TransformerGroup

    with warnings.catch_warnings():
        warnings.simplefilter("ignore", UserWarning)  # "best transformation is not available": said below
        group = TransformerGroup(src, dst, always_xy=True)
    exact = [t for t in group.transformers if "ballpark" not in t.description.lower()]
    if exact:
        return exact[0], None
    grids = sorted({g.short_name for op in group.unavailable_operations for g in op.grids if not g.available})
    need = f"the PROJ grid {', '.join(grids)}" if grids else "a geoid grid"
    reason = (f"PROJ has no geoid correction between them here ({need} is not installed; install it with "
              f"projsync --file {grids[0] if grids else 'NAME'} or set PROJ_NETWORK=ON)")
    return None, reason


def heights(ground: Ground | None, lon, lat, above_m: float | None) -> dict:
    """The heights of points at ``above_m`` over the ground, each as each format means it.

    Returns a dict: ``ground_m`` (array or None), ``sea_level_m`` (for GPX ``<ele>``)
    and ``ellipsoidal_m`` (for a GeoJSON third coordinate), each an array or None,
    and ``no_sea_level`` / ``no_ellipsoidal``, the reason a height is left out.
    """
    lon, lat = np.atleast_1d(np.asarray(lon, float)), np.atleast_1d(np.asarray(lat, float))
    if ground is None:
        why = ("no ground elevation was given (--ground-elev-m with --vertical-datum, or --dem), so the height above "
               "ground cannot be turned into one")
        return {"ground_m": None, "sea_level_m": None, "ellipsoidal_m": None,
                "no_sea_level": f"no elevation above sea level: {why}",
                "no_ellipsoidal": f"no height above the WGS 84 ellipsoid: {why}"}
    from pyproj import CRS
    from pyproj.crs import CompoundCRS

    g = ground.elevation(lon, lat)
    h = g + (above_m or 0.0)
    wgs84_3d = CRS.from_epsg(4979)
    out = {"ground_m": g, "sea_level_m": None, "ellipsoidal_m": None, "no_sea_level": None, "no_ellipsoidal": None}
    if ground.datum is None:
        out["ellipsoidal_m"] = h
        sea = CRS.from_user_input(SEA_LEVEL_CRS)
        t, reason = _vertical_transform(wgs84_3d, CompoundCRS("WGS 84 + EGM96 height", [CRS.from_epsg(4326), sea]))
        if t is None:
            out["no_sea_level"] = f"no elevation above sea level: the ground is given in ellipsoidal heights and {reason}"
        else:
            out["sea_level_m"] = np.asarray(t.transform(lon, lat, h)[2], float)
    else:
        # a gravity-related height is a height above a realisation of sea level
        out["sea_level_m"] = h
        compound = CompoundCRS(f"WGS 84 + {ground.datum.name}", [CRS.from_epsg(4326), ground.datum])
        t, reason = _vertical_transform(compound, wgs84_3d)
        if t is None:
            out["no_ellipsoidal"] = (f"no height above the WGS 84 ellipsoid: the ground is given in "
                                     f"{ground.datum_name} and {reason}")
        else:
            out["ellipsoidal_m"] = np.asarray(t.transform(lon, lat, h)[2], float)
    for key in ("sea_level_m", "ellipsoidal_m"):
        if out[key] is not None and not np.all(np.isfinite(out[key])):
            raise SettingsError(f"the {key.removesuffix('_m').replace('_', ' ')} heights of the waypoints are not "
                                "finite after the datum conversion")
    return out
