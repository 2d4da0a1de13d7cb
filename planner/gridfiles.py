"""The grid and its risk maps as GIS files: a GeoTIFF in the working frame, cells as polygons.

A reviewer lays these over imagery: the GeoTIFF holds, per cell, the probability
that a run from there ends in an incident under each route's policy (NaN where a
run cannot be: outside, in an ending hazard, at the goal) and the cell labels, in
the run's working frame with its CRS and transform (rasterio, in the ``gis`` extra).
The hazard-entry cells, the cells the grid treats as hazard, are GeoJSON polygons in
lon/lat. Row 0 of the grid is its southern row, so the raster's rows run the other
way (GeoTIFF's first row is the northern one).
"""

from __future__ import annotations

from pathlib import Path

import numpy as np

from planner.errors import SettingsError
from planner.grid import FREE, OUTSIDE

#: Label-band code of goal cells (the other codes are the grid's: -2 outside, -1 free,
#: k >= 0 hazard k).
GOAL_CODE = -3


def require_rasterio(what: str):
    """The rasterio module, or one line naming the extra that provides it."""
    try:
        import rasterio
    except ImportError as err:
        raise SettingsError(f"{what} needs the optional GIS extra: pip install 'veerwise[gis]'") from err
    return rasterio


def label_codes(grid) -> np.ndarray:
    """The label band: the grid's labels with goal cells as :data:`GOAL_CODE`, shape ``grid.shape``."""
    codes = grid.label.astype(np.float64)
    codes[grid.goal] = GOAL_CODE
    return codes


def band_description(policy: str, noise: float, drift_scale: float) -> str:
    """How a risk band names itself: route, noise level and drift scale."""
    return (f"P(incident) from each cell, {policy} route, noise {noise:g}, drift x{drift_scale:g} "
            "(NaN: outside, ending hazard or goal)")


def write_grid_geotiff(path, grid, frame, maps: dict, *, noise: float, drift_scale: float, notice: str) -> Path:
    """Write the risk map of each route and the cell labels as one GeoTIFF (float64).

    Parameters
    ----------
    path : the file to write (the caller makes the write atomic).
    grid : the run's :class:`~planner.grid.Grid`.
    frame : the site's :class:`~planner.site.Frame` (its CRS is the raster's).
    maps : route name -> float64 ``(n_states,)`` from :func:`planner.risk.risk_map`.
    noise, drift_scale : what the maps were computed at (named in the band descriptions).
    notice : the simulation-only notice, written as a dataset tag.

    Bands 1..n are the routes in ``maps`` order; the last band holds the labels
    (:func:`label_codes`), its tags naming each hazard by its code. nodata is NaN.
    """
    rasterio = require_rasterio(f"{path}: writing a GeoTIFF")
    from rasterio.crs import CRS
    from rasterio.transform import from_origin

    n_rows, n_cols = grid.shape
    bands = [np.asarray(maps[name], np.float64).reshape(grid.shape) for name in maps]
    bands.append(label_codes(grid))
    transform = from_origin(grid.x0, grid.y0 + n_rows * grid.cell_m, grid.cell_m, grid.cell_m)
    profile = {"driver": "GTiff", "width": n_cols, "height": n_rows, "count": len(bands), "dtype": "float64",
               "crs": CRS.from_user_input(frame.crs), "transform": transform, "nodata": float("nan"),
               "compress": "deflate"}
    with rasterio.open(path, "w", **profile) as out:
        for k, (name, band) in enumerate(zip([*maps, "labels"], bands, strict=True), start=1):
            out.write(band[::-1], k)  # GeoTIFF rows run north to south
            if name == "labels":
                out.set_band_description(k, f"cell label: {GOAL_CODE} goal, {OUTSIDE} outside, {FREE} free, "
                                            "k >= 0 hazard k (see the band's tags)")
                out.update_tags(k, **{f"HAZARD_{h}": info.name for h, info in enumerate(grid.hazards)})
            else:
                out.set_band_description(k, band_description(name, noise, drift_scale))
                out.update_tags(k, POLICY=name, NOISE=f"{noise:g}", DRIFT_SCALE=f"{drift_scale:g}")
        out.update_tags(USE=notice, CELL_M=f"{grid.cell_m:g}", ROW_ORDER="first row is the northern row")
    return Path(path)


def hazard_cells_geojson(grid, frame, *, notice: str) -> dict:
    """The hazard-entry cells (labelled hazard) as an RFC 7946 FeatureCollection of lon/lat squares.

    One Polygon per cell, its ring counter-clockwise (RFC 7946 section 3.1.6), corners
    taken from the working frame to lon/lat; properties name the hazard, whether it
    ends the run, the cell's row and column (row 0 south) and its centre in metres.
    """
    rows, cols = np.nonzero(grid.label >= 0)
    cell = grid.cell_m
    x0 = grid.x0 + cols * cell
    y0 = grid.y0 + rows * cell
    # corners in counter-clockwise order: SW, SE, NE, NW, SW
    xs = np.stack([x0, x0 + cell, x0 + cell, x0, x0], axis=1)
    ys = np.stack([y0, y0, y0 + cell, y0 + cell, y0], axis=1)
    lon, lat = frame.to_lonlat(xs.ravel(), ys.ravel())
    lon, lat = lon.reshape(xs.shape), lat.reshape(ys.shape)
    features = []
    for k, (r, c) in enumerate(zip(rows, cols, strict=True)):
        info = grid.hazards[int(grid.label[r, c])]
        ring = [[round(float(a), 9), round(float(b), 9)] for a, b in zip(lon[k], lat[k], strict=True)]
        features.append({
            "type": "Feature",
            "geometry": {"type": "Polygon", "coordinates": [ring]},
            "properties": {"kind": "hazard cell", "hazard": info.name, "ends_run": bool(info.ends_run),
                           "row": int(r), "col": int(c), "east_m": round(float(x0[k] + cell / 2), 3),
                           "north_m": round(float(y0[k] + cell / 2), 3), "cell_m": cell, "use": notice},
        })
    return {"type": "FeatureCollection", "use": notice, "features": features}
