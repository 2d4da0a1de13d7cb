"""A legacy GeoJSON ``crs`` member: what it names, and positions taken from it to lon/lat.

RFC 7946 dropped the member; GDAL still writes one (naming CRS84) by default, and a
file saved in a projected CRS names that CRS in it. :mod:`planner.site` reads a file
with this module's answer: nothing to do, a reprojection with pyproj, or a refusal
with the exact fix.
"""

from __future__ import annotations

import math

import numpy as np

from planner.errors import SiteError


def _finite(value) -> bool:
    try:
        return math.isfinite(float(value))
    except OverflowError:
        return False


def crs_member_transform(member, source: str, lonlat_names, advice: str):
    """What a legacy GeoJSON ``crs`` member means for a file's positions.

    ``lonlat_names`` are the lower-case names taken as WGS 84 lon/lat; ``advice`` is
    the site reader's advice on reprojecting a file.

    Returns ``(transform, note)``: ``transform`` is None when the member names WGS 84
    lon/lat (CRS84, or EPSG:4326 with positions in lon/lat order as RFC 7946 has them),
    else a function taking arrays of x and y in the named CRS to lon and lat (pyproj,
    ``always_xy``). ``note`` says in one line what was done.

    Raises
    ------
    SiteError
        When the member names no CRS pyproj can resolve, or one that is not horizontal
        (geographic or projected), with the exact fix.
    """
    props = member.get("properties") if isinstance(member, dict) else None
    name = props.get("name") if isinstance(props, dict) else None
    fix = ("delete the member if the positions are WGS 84 lon/lat, name the CRS as 'EPSG:NNNN' (for example "
           f"'urn:ogc:def:crs:EPSG::32632'), or {advice}")
    if not isinstance(name, str) or not name.strip():
        raise SiteError(f"{source}: has a 'crs' member that names no CRS (only the 'name' form is read); {fix}")
    if name.strip().lower() in lonlat_names:
        return None, (f"{source}: its legacy 'crs' member names {name.strip()!r:.80}, which is WGS 84 lon/lat; "
                      "positions read as [lon, lat] as RFC 7946 has them")
    from pyproj import CRS, Transformer
    from pyproj.exceptions import CRSError

    try:
        named = CRS.from_user_input(name.strip())
    except CRSError as err:
        raise SiteError(f"{source}: has a 'crs' member naming {name!r:.80}, which pyproj cannot resolve; "
                        f"{fix}") from err
    if not (named.is_projected or named.is_geographic):
        raise SiteError(f"{source}: has a 'crs' member naming {name!r:.80}, a {named.type_name}, not a horizontal "
                        f"CRS; {fix}")
    transformer = Transformer.from_crs(named, CRS.from_epsg(4326), always_xy=True)

    def transform(x, y):
        lon, lat = transformer.transform(np.asarray(x, float), np.asarray(y, float))
        return np.asarray(lon, float), np.asarray(lat, float)

    code = named.to_authority()
    called = f"{named.name} ({':'.join(code)})" if code else named.name
    return transform, (f"{source}: positions are in {called} as its 'crs' member says; reprojected to WGS 84 "
                       "lon/lat with pyproj")


def reproject_positions(geometry, transform, where: str):
    """A copy of a GeoJSON geometry with every position taken to lon/lat by ``transform``.

    Positions must be 2 or 3 finite numbers; anything else is left for the feature's
    own checks to name. A third coordinate is kept as it is.
    """
    if not isinstance(geometry, dict) or not isinstance(geometry.get("coordinates"), list):
        return geometry
    positions: list = []

    def collect(node):
        if isinstance(node, list) and node and all(isinstance(v, (int, float)) and not isinstance(v, bool)
                                                   for v in node):
            if not 2 <= len(node) <= 3 or not all(_finite(v) for v in node):
                raise SiteError(f"{where}: a position must be 2 or 3 finite numbers, got {node!r:.60}")
            positions.append(node)
        elif isinstance(node, list):
            for child in node:
                collect(child)

    collect(geometry["coordinates"])
    if not positions:
        return geometry
    x, y = transform([p[0] for p in positions], [p[1] for p in positions])
    if not (np.all(np.isfinite(x)) and np.all(np.isfinite(y))):
        raise SiteError(f"{where}: positions cannot be reprojected to lon/lat from the CRS the file names")
    moved = {id(p): [float(a), float(b), *p[2:]] for p, a, b in zip(positions, x, y, strict=True)}

    def rebuild(node):
        if id(node) in moved:
            return moved[id(node)]
        return [rebuild(c) for c in node] if isinstance(node, list) else node

    return {**geometry, "coordinates": rebuild(geometry["coordinates"])}
