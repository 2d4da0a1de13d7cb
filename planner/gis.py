"""Site files from GIS editors: any vector format GDAL reads, several files merged, a template.

This stage sits between the site file and :mod:`planner.site`. One GeoJSON file is
read exactly as before (its bytes are the run's site copy). Anything else, a
GeoPackage with one layer per role, a Shapefile, FlatGeobuf, or several files whose
features together make the site (a boundary in one, hazards in another), is read
into one FeatureCollection in WGS 84 lon/lat, written as canonical GeoJSON text, and
validated from those bytes: that text is what the run folder keeps as
``site.geojson``, so ``risk``, ``export`` and ``brief`` rebuild the same site from
it. Every error names the file (and layer) and the feature there.

Formats other than GeoJSON are read through pyogrio (GDAL), an optional extra
(``pip install 'veerwise[gis]'``); without it such a file is refused in one line
naming the extra.
"""

from __future__ import annotations

import hashlib
import json
import math
import warnings
from pathlib import Path

import numpy as np

from planner.errors import SettingsError, SiteError
from planner.site import (
    DEFAULT_MAX_BYTES,
    ROLES,
    SITE_SCHEMA,
    Site,
    lonlat_features,
    parse_site_bytes,
    plain_feature,
    read_site_bytes,
    site_from_bytes,
)

#: How to install what reading and writing GIS formats needs.
GIS_EXTRA = "pip install 'veerwise[gis]'"
#: File-name endings read as GeoJSON by our own strict reader.
GEOJSON_SUFFIXES = (".geojson", ".json")
#: The first bytes of every SQLite database, so of every GeoPackage.
SQLITE_MAGIC = b"SQLite format 3\x00"
#: Sidecar files a Shapefile is read with (hashed beside the ``.shp``).
SHAPEFILE_SIDECARS = (".shx", ".dbf", ".prj", ".cpg")
#: Most files merged into one site.
MAX_SITE_FILES = 100


def require_pyogrio(what: str):
    """The pyogrio module, or one line naming the extra that provides it."""
    try:
        import pyogrio
    except ImportError as err:
        raise SiteError(f"{what} needs the optional GIS extra: {GIS_EXTRA}") from err
    return pyogrio


def is_geojson(path, data: bytes) -> bool:
    """Whether a site file is read as GeoJSON (by us) rather than through GDAL."""
    if data.startswith(SQLITE_MAGIC):
        return False
    if Path(path).suffix.lower() in GEOJSON_SUFFIXES:
        return True
    return data.lstrip(b"\xef\xbb\xbf \t\r\n").startswith(b"{")


def _kind(path, data: bytes) -> str:
    if data.startswith(SQLITE_MAGIC) or Path(path).suffix.lower() == ".gpkg":
        return "a GeoPackage"
    return f"a {Path(path).suffix or 'non-GeoJSON'} file"


def _sha256(data: bytes) -> str:
    return hashlib.sha256(data).hexdigest()


def load_sites(paths, *, crs: str | None = None, fix: bool = False, max_bytes: int = DEFAULT_MAX_BYTES) -> Site:
    """Load one or several site files as one validated :class:`~planner.site.Site`.

    Parameters
    ----------
    paths : a path or a list of paths; GeoJSON, or any vector format GDAL reads
        (with the ``gis`` extra). Several files are merged in the order given.
    crs, fix, max_bytes : as :func:`planner.site.load_site` (``max_bytes`` per file).

    A single GeoJSON file keeps its own bytes as the site's ``data``; otherwise
    ``data`` is the merged collection as canonical GeoJSON text and ``inputs`` lists
    every file read with its SHA-256.
    """
    paths = [paths] if isinstance(paths, (str, Path)) else list(paths)
    if not paths:
        raise SettingsError("no site file given; name at least one")
    if len(paths) > MAX_SITE_FILES:
        raise SettingsError(f"{len(paths)} site files given; at most {MAX_SITE_FILES} are merged")
    seen = set()
    for p in paths:
        key = Path(p).resolve()
        if key in seen:
            raise SettingsError(f"{p}: given twice as a site file; name each file once")
        seen.add(key)
    blobs = [(str(p), read_site_bytes(p, max_bytes=max_bytes)) for p in paths]
    if len(blobs) == 1 and is_geojson(*blobs[0]):
        return site_from_bytes(blobs[0][1], source=blobs[0][0], crs=crs, fix=fix)
    features, origins, notes, inputs = [], [], [], []
    for path, data in blobs:
        inputs.append((path, _sha256(data)))
        if is_geojson(path, data):
            obj, _ = parse_site_bytes(data, path)
            found, said = lonlat_features(obj, path)
            found = [plain_feature(k, f, path) for k, f in enumerate(found)]
            where = [(path, k) for k in range(len(found))]
        else:
            found, where, said, extra = read_vector(path, data)
            inputs += extra
        features += found
        origins += where
        notes += said
    merged = merged_text(features).encode("utf-8")
    source = " + ".join(path for path, _ in blobs)
    return site_from_bytes(merged, source=source, crs=crs, fix=fix, origins=origins, notes=tuple(notes),
                           inputs=tuple(inputs))


def merged_text(features: list) -> str:
    """Features as one site FeatureCollection: canonical GeoJSON text, one feature per line.

    Coordinates keep every digit of their float64 value, so reading the text back
    gives the very same positions.
    """
    def dump(value) -> str:
        return json.dumps(value, ensure_ascii=False, allow_nan=False, separators=(", ", ": "))

    head = f'{{"type": "FeatureCollection", "properties": {{"site_schema": {SITE_SCHEMA}}}, "features": [\n'
    return head + ",\n".join(dump(f) for f in features) + "\n]}\n"


# ----------------------------------------------------------------------------- GDAL


def read_vector(path: str, data: bytes) -> tuple[list, list, list, list]:
    """The features of a vector file GDAL reads, in WGS 84 lon/lat, as GeoJSON dicts.

    Returns ``(features, origins, notes, extra inputs)``. A layer named after a role
    (``boundary``, ``hazard``, ...) gives its features that role unless they carry a
    ``role`` column of their own (which must agree). Null attributes are left out;
    layers without geometry (a style table) are skipped with a note.
    """
    pyogrio = require_pyogrio(f"{path}: reading {_kind(path, data)}")
    from pyogrio.errors import DataLayerError, DataSourceError

    extra = []
    source = data
    if Path(path).suffix.lower() == ".shp":
        # a Shapefile is several files: GDAL reads them from disk; each is hashed
        source = str(path)
        for suffix in SHAPEFILE_SIDECARS:
            side = Path(path).with_suffix(suffix)
            if side.is_file():
                extra.append((str(side), _sha256(side.read_bytes())))
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", RuntimeWarning)  # "non conformant file extension" from memory
            layers = pyogrio.list_layers(source)
    except (DataSourceError, DataLayerError, OSError) as err:
        raise SiteError(f"{path}: not a vector format GDAL reads ({_first_line(err)}); save the site as GeoJSON "
                        "or GeoPackage") from err
    features, origins, notes = [], [], []
    spatial = [(str(name), gtype) for name, gtype in layers if gtype is not None]
    for name, gtype in layers:
        if gtype is None:
            notes.append(f"{path}: layer {str(name)!r} has no geometry (a table of its own); not read")
    if not spatial:
        raise SiteError(f"{path}: has no layer with geometry; draw the site's features in a vector layer")
    for name, _ in spatial:
        prefix = str(path) if len(spatial) == 1 else f"{path} layer {name!r}"
        try:
            with warnings.catch_warnings():
                warnings.simplefilter("ignore", RuntimeWarning)
                meta, _, geometry, fields = pyogrio.raw.read(source, layer=name, force_2d=True)
        except (DataSourceError, DataLayerError, OSError) as err:
            raise SiteError(f"{prefix}: GDAL cannot read the layer ({_first_line(err)})") from err
        transform, note = _layer_transform(meta.get("crs"), prefix)
        if note:
            notes.append(note)
        role = name.strip().lower() if name.strip().lower() in ROLES else None
        columns = [str(c) for c in meta["fields"]]
        if Path(path).suffix.lower() == ".shp":
            columns = [shapefile_column(c) for c in columns]
        for k in range(len(geometry)):
            props = {c: _value(fields[j][k]) for j, c in enumerate(columns)}
            props = {c: v for c, v in props.items() if v is not None}
            if role is not None:
                given = props.get("role")
                if given is not None and given != role:
                    raise SiteError(f"{prefix}: feature {k}: role {given!r:.40} in the layer named for role "
                                    f"'{role}'; move the feature to the layer of its role or clear its role")
                props["role"] = role
            features.append({"type": "Feature", "properties": props,
                             "geometry": _geometry(geometry[k], transform, f"{prefix}: feature {k}")})
            origins.append((prefix, k))
    return features, origins, notes, extra


#: Every property name a site feature may carry.
PROPERTY_NAMES = ("role", "name", "ends_run", "penalty_m", "buffer_m", "cost_factor", "toward_deg", "from_deg",
                  "drift_per_m", "spread_per_sqrt_m", "chance")
#: A Shapefile's attribute table (dBase) keeps at most this many characters of a column name.
SHAPEFILE_NAME_CHARS = 10


def shapefile_column(column: str) -> str:
    """A Shapefile column name cut to 10 characters, as the property it is the start of.

    >>> shapefile_column("spread_per"), shapefile_column("cost_facto"), shapefile_column("depth")
    ('spread_per_sqrt_m', 'cost_factor', 'depth')
    """
    if len(column) != SHAPEFILE_NAME_CHARS:
        return column
    found = [p for p in PROPERTY_NAMES if len(p) > SHAPEFILE_NAME_CHARS and p.startswith(column)]
    return found[0] if len(found) == 1 else column


def _first_line(err) -> str:
    text = str(err).strip().splitlines()
    return text[0][:200] if text else type(err).__name__


def _layer_transform(crs_text, prefix: str):
    """(transform to lon/lat or None, note) for a layer's CRS as GDAL reports it."""
    from pyproj import CRS, Transformer
    from pyproj.exceptions import CRSError

    if not crs_text:
        raise SiteError(f"{prefix}: the layer has no coordinate reference system; set it (EPSG:4326 for lon/lat) "
                        "in the GIS editor and save again")
    try:
        crs = CRS.from_user_input(crs_text)
    except CRSError as err:
        raise SiteError(f"{prefix}: the layer's CRS is not one pyproj can resolve; reproject the layer to "
                        "EPSG:4326 in the GIS editor") from err
    wgs84 = CRS.from_epsg(4326)
    if crs.equals(wgs84, ignore_axis_order=True):
        return None, None
    if not (crs.is_projected or crs.is_geographic):
        raise SiteError(f"{prefix}: the layer's CRS ({crs.name}) is not horizontal; reproject the layer to "
                        "EPSG:4326 in the GIS editor")
    transformer = Transformer.from_crs(crs, wgs84, always_xy=True)
    code = crs.to_authority()
    called = f"{crs.name} ({':'.join(code)})" if code else crs.name
    return transformer, f"{prefix}: positions are in {called}; reprojected to WGS 84 lon/lat with pyproj"


def _value(v):
    """A table cell as a JSON value: missing (None, NaN) as None, numpy scalars as Python ones."""
    if v is None:
        return None
    if isinstance(v, (bool, np.bool_)):
        return bool(v)
    if isinstance(v, (int, np.integer)):
        return int(v)
    if isinstance(v, (float, np.floating)):
        return None if math.isnan(float(v)) else float(v)
    if isinstance(v, np.datetime64):
        return None if np.isnat(v) else str(v)
    if isinstance(v, bytes):
        return v.hex()
    return v if isinstance(v, str) else str(v)


def _geometry(wkb, transform, where: str):
    """A geometry from GDAL's WKB as a GeoJSON dict in lon/lat with every float64 digit kept."""
    import shapely

    if wkb is None:
        return None
    try:
        geom = shapely.from_wkb(wkb)
    except shapely.errors.GEOSException as err:
        raise SiteError(f"{where}: a geometry shapely cannot read ({err}); convert curves to polygons") from err
    if geom is None or geom.is_empty:
        return None

    def coords(part):
        xy = shapely.get_coordinates(part)
        x, y = xy[:, 0], xy[:, 1]
        if transform is not None:
            x, y = transform.transform(x, y)
            x, y = np.asarray(x, float), np.asarray(y, float)
            if not (np.all(np.isfinite(x)) and np.all(np.isfinite(y))):
                raise SiteError(f"{where}: positions cannot be reprojected to lon/lat")
        return [[float(a), float(b)] for a, b in zip(x, y, strict=True)]

    def polygon(p):
        return [coords(p.exterior)] + [coords(r) for r in p.interiors]

    kind = geom.geom_type
    if kind == "Point":
        return {"type": kind, "coordinates": coords(geom)[0]}
    if kind in ("LineString", "LinearRing"):
        return {"type": "LineString", "coordinates": coords(geom)}
    if kind == "Polygon":
        return {"type": kind, "coordinates": polygon(geom)}
    if kind == "MultiPoint":
        return {"type": kind, "coordinates": [coords(p)[0] for p in geom.geoms]}
    if kind == "MultiLineString":
        return {"type": kind, "coordinates": [coords(p) for p in geom.geoms]}
    if kind == "MultiPolygon":
        return {"type": kind, "coordinates": [polygon(p) for p in geom.geoms]}
    return {"type": kind, "geometries": []}


# ----------------------------------------------------------------------------- template


#: Where the template's example features lie (a fictional spot; redraw them on your yard).
TEMPLATE_CENTRE = (2.7200, 46.8500)
#: Every column a site layer may have, with its type (the role column aside).
COLUMN_TYPES = {"name": str, "ends_run": bool, "penalty_m": float, "buffer_m": float, "cost_factor": float,
                "toward_deg": float, "from_deg": float, "drift_per_m": float, "spread_per_sqrt_m": float,
                "chance": float}
#: The columns of each role's layer, in order (``planner.site`` refuses any other).
ROLE_COLUMNS = {
    "boundary": ("name",),
    "start": ("name",),
    "goal": ("name",),
    "hazard": ("name", "ends_run", "penalty_m", "buffer_m"),
    "rough": ("name", "cost_factor"),
    "drift": ("name", "toward_deg", "from_deg", "drift_per_m", "spread_per_sqrt_m", "chance"),
}
#: GeoPackage geometry type of each role's layer (a goal is a point or an area).
ROLE_GEOMETRY = {"boundary": "MultiPolygon", "start": "Point", "goal": "Unknown", "hazard": "MultiPolygon",
                 "rough": "MultiPolygon", "drift": "MultiPolygon"}


def _template_examples() -> list[tuple[str, object, dict]]:
    """(role, geometry in metres around the centre, properties) of the template's examples."""
    from shapely.geometry import Point, box

    return [
        ("boundary", box(-100, -60, 100, 60), {"name": "Example yard (redraw on your site)"}),
        ("start", Point(-85, 0), {"name": "Launch point"}),
        ("goal", Point(85, 0), {"name": "Target"}),
        ("hazard", box(-10, -20, 10, 20), {"name": "Example pond", "ends_run": True, "penalty_m": 1000.0,
                                           "buffer_m": 2.0}),
        ("rough", box(30, -60, 100, -40), {"name": "Example gravel", "cost_factor": 1.5}),
        ("drift", box(-60, 30, 60, 60), {"name": "Example gust lane", "toward_deg": 180.0, "drift_per_m": 0.2,
                                         "spread_per_sqrt_m": 0.1, "chance": 0.5}),
    ]


#: An extra drift example in the GeoJSON template only: GeoJSON has no column types, so a
#: GIS editor types a column from its values, and ``from_deg`` needs one to be a number.
_FROM_EXAMPLE = ("drift", (-60, -60, 0, -40), {"name": "Example side-slope (weather convention)", "from_deg": 270.0,
                                              "drift_per_m": 0.1, "spread_per_sqrt_m": 0.05, "chance": 1.0})


def _to_lonlat(geom):
    """A template geometry from metres around :data:`TEMPLATE_CENTRE` to lon/lat (7 decimals, about 1 cm)."""
    import shapely
    from pyproj import Transformer

    lon_0, lat_0 = TEMPLATE_CENTRE
    t = Transformer.from_crs(f"+proj=tmerc +lat_0={lat_0} +lon_0={lon_0} +k=1 +ellps=WGS84 +units=m +type=crs",
                             "EPSG:4326", always_xy=True)

    def move(xy):
        lon, lat = t.transform(xy[:, 0], xy[:, 1])
        return np.round(np.column_stack([lon, lat]), 7)

    return shapely.transform(geom, move)


def template_collection() -> dict:
    """The site template as a GeoJSON FeatureCollection: one example per role, every column on every feature.

    Columns that do not apply to a role are ``null`` (as a GIS editor stores a table);
    each column has a value in some feature, so an editor gives it its type.
    """
    from shapely.geometry import box, mapping

    examples = _template_examples()
    role, bounds, props = _FROM_EXAMPLE
    examples.append((role, box(*bounds), props))
    features = []
    for role, geom, props in examples:
        shape = json.loads(json.dumps(mapping(_to_lonlat(geom))))  # tuples to lists
        features.append({"type": "Feature",
                         "properties": {"role": role, **{c: props.get(c) for c in COLUMN_TYPES}},
                         "geometry": shape})
    return {"type": "FeatureCollection", "name": "veerwise site template",
            "properties": {"site_schema": SITE_SCHEMA}, "features": features}


def template_geojson_text() -> str:
    """:func:`template_collection` as the text the template file holds (one feature per line)."""
    obj = template_collection()
    head = json.dumps({k: v for k, v in obj.items() if k != "features"}, ensure_ascii=False)
    body = ",\n".join(json.dumps(f, ensure_ascii=False) for f in obj["features"])
    return f'{head[:-1]}, "features": [\n{body}\n]}}\n'


def write_template_geopackage(path) -> Path:
    """Write the site template as a GeoPackage: one layer per role with its typed columns and one example.

    ``path`` must not exist yet (the caller writes to a fresh temporary name and
    renames it into place).
    """
    pyogrio = require_pyogrio(f"{path}: writing a GeoPackage")
    import shapely

    append = False
    for role, geom, props in _template_examples():
        geom = _to_lonlat(geom)
        if ROLE_GEOMETRY[role] == "MultiPolygon":
            geom = shapely.MultiPolygon([geom])
        columns = ROLE_COLUMNS[role]
        data = []
        for c in columns:
            kind, value = COLUMN_TYPES[c], props.get(c)
            if kind is str:
                data.append(np.array([value], dtype=object))
            elif kind is bool:
                data.append(np.array([bool(value)]))
            else:
                data.append(np.array([np.nan if value is None else value], dtype=np.float64))
        pyogrio.raw.write(str(path), np.array([shapely.to_wkb(geom)], dtype=object), data, fields=list(columns),
                          layer=role, driver="GPKG", geometry_type=ROLE_GEOMETRY[role], crs="EPSG:4326",
                          append=append)
        append = True
    return Path(path)
