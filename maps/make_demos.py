"""Write the demo site files in this folder from shapes drawn in local metres.

Each site is laid out in east/north metres from its south-west corner, then taken to
WGS 84 lon/lat through a local transverse Mercator centred on the site, and written
as an RFC 7946 FeatureCollection (exterior rings counter-clockwise, coordinates rounded
to 7 decimals, about 1 cm). Both sites and their places are fictional.

Run from anywhere::

    python3 maps/make_demos.py
"""

from __future__ import annotations

import json
import math
from pathlib import Path

from pyproj import Transformer
from shapely.geometry import LineString, Polygon
from shapely.geometry.polygon import orient

HERE = Path(__file__).resolve().parent
DECIMALS = 7
#: The site-file schema the demos are written in (drift per metre travelled).
SITE_SCHEMA = 2


# ----------------------------------------------------------------------------- shapes in metres


def rect(x0, y0, x1, y1):
    """An axis-aligned rectangle from its south-west and north-east corners."""
    return Polygon([(x0, y0), (x1, y0), (x1, y1), (x0, y1)])


def ellipse(cx, cy, rx, ry, n=32):
    """An axis-aligned ellipse drawn with ``n`` vertices."""
    return Polygon([(cx + rx * math.cos(2 * math.pi * k / n), cy + ry * math.sin(2 * math.pi * k / n))
                    for k in range(n)])


def strip(points, width):
    """A thin band of ``width`` metres along a polyline, with square-cut ends."""
    return LineString(points).buffer(width / 2.0, cap_style="flat", join_style="mitre")


def outline(points):
    """A polygon through the given corners, in order."""
    return Polygon(points)


# ----------------------------------------------------------------------------- GeoJSON


class SiteWriter:
    """Collects features drawn in metres and writes them as lon/lat GeoJSON."""

    def __init__(self, lon, lat, width_m, height_m):
        # The projection is centred on the site (as the loader's working frame is), so
        # the drawn rectangle stays axis-aligned there: a corner anchor would rotate it
        # by the meridian convergence and widen its bounding box by a centimetre.
        self._to_lonlat = Transformer.from_crs(
            f"+proj=tmerc +lat_0={lat} +lon_0={lon} +k=1 +x_0={width_m / 2} +y_0={height_m / 2} "
            "+ellps=WGS84 +units=m +type=crs",
            "EPSG:4326", always_xy=True,
        )
        self.features = []

    def _position(self, x, y):
        lon, lat = self._to_lonlat.transform(x, y)
        return [round(lon, DECIMALS), round(lat, DECIMALS)]

    def _ring(self, coords):
        ring = [self._position(x, y) for x, y in coords]
        ring[-1] = ring[0]  # rounding must not open the ring
        return ring

    def area(self, role, shape, **properties):
        shape = orient(shape, sign=1.0)  # RFC 7946: exterior counter-clockwise, holes clockwise
        rings = [self._ring(shape.exterior.coords)] + [self._ring(r.coords) for r in shape.interiors]
        self._add(role, {"type": "Polygon", "coordinates": rings}, properties)

    def point(self, role, x, y, **properties):
        self._add(role, {"type": "Point", "coordinates": self._position(x, y)}, properties)

    def _add(self, role, geometry, properties):
        self.features.append({"type": "Feature", "properties": {"role": role, **properties}, "geometry": geometry})

    def collection(self):
        return {"type": "FeatureCollection", "properties": {"site_schema": SITE_SCHEMA}, "features": self.features}

    def write(self, path):
        # One feature per line keeps the file small and its diffs readable.
        lines = ",\n".join("    " + json.dumps(f, separators=(", ", ": ")) for f in self.features)
        path.write_text('{\n  "type": "FeatureCollection",\n  "properties": {"site_schema": %d},\n'
                        '  "features": [\n' % SITE_SCHEMA + lines + "\n  ]\n}\n")


# ----------------------------------------------------------------------------- the sites


def ground_yard():
    """Marrowfield robot yard: a 428 m x 277 m ground-vehicle test yard."""
    site = SiteWriter(lon=2.7134, lat=46.8421, width_m=428, height_m=277)
    site.area("boundary", outline([(0, 0), (428, 0), (428, 240), (391, 277), (0, 277)]),
              name="Marrowfield robot yard")
    site.point("start", 32, 152, name="Charging bay")
    site.point("goal", 397, 152, name="Inspection pad")
    # The straight line from the charging bay to the pad runs along the embankment, a
    # 23 m lane between the dock's drop edge and the pond: short, but on a side-slope
    # that pushes wheels toward the drop.
    site.area("hazard", strip([(105, 132), (315, 132)], 3.0), name="Loading-dock drop edge")
    site.area("drift", rect(100, 133.5, 320, 158.5), name="Embankment side-slope",
              toward_deg=180.0, drift_per_m=0.3, spread_per_sqrt_m=0.45, chance=0.7)
    site.area("hazard", rect(140, 168.5, 280, 215).buffer(10.0), name="Settling pond", buffer_m=2.0)
    site.area("rough", rect(112, 40, 318, 128.5), name="Gravel apron", cost_factor=1.6)
    site.area("hazard", rect(336, 31, 372, 69), name="Fuel store no-go area")
    site.area("hazard", strip([(62, 236), (62, 277)], 1.0), name="Paddock fence")
    # A covered trench a robot can cross, at a cost, without ending the trial.
    site.area("hazard", strip([(352.5, 96), (352.5, 137)], 2.0), name="Cable trench", ends_run=False,
              penalty_m=30.0)
    return site


def drone_range():
    """Keldby drone range: a 523 m x 357 m flying range with two hangars and a lake."""
    site = SiteWriter(lon=-4.1320, lat=39.8610, width_m=523, height_m=357)
    site.area("boundary", outline([(0, 22), (42, 0), (523, 0), (523, 357), (0, 357)]),
              name="Keldby drone range")
    site.point("start", 42, 182, name="Launch pad")
    site.area("goal", ellipse(482, 182, 8, 8, n=16), name="Landing circle")
    # Northerly gusts spill over the north hangar into the 22.5 m gap between the
    # hangars, which the direct line to the landing circle threads.
    site.area("hazard", rect(215, 191, 295, 300), name="North hangar")
    site.area("hazard", rect(215, 63, 295, 168.5), name="South hangar")
    site.area("drift", rect(200, 150, 310, 210), name="Hangar gap gusts",
              from_deg=0.0, drift_per_m=0.5, spread_per_sqrt_m=0.9, chance=0.7)
    site.area("hazard", rect(358, 206, 362, 210), name="Radio mast", buffer_m=12.0)
    site.area("hazard", outline([(322, 38), (431, 33), (456, 91), (421, 141), (341, 131)]), name="Reed lake")
    site.area("hazard", rect(91, 301, 131, 331), name="Spectator area no-go")
    return site


def main(folder=HERE):
    """Write both demo sites into ``folder`` (this folder by default)."""
    folder = Path(folder)
    ground_yard().write(folder / "ground-yard.geojson")
    drone_range().write(folder / "drone-range.geojson")


if __name__ == "__main__":
    main()
