"""A run folder read back: checked before it is read, rebuilt, tabulated, briefed again.

The manifest is read with a strict JSON reader and checked against its schema, every
listed file is read once (never through a symlink) and must match its hash, and the
site, grid and model are rebuilt from those bytes and the recorded settings, so
``risk``, ``export`` and ``brief`` see exactly what ``plan`` used.
"""

from __future__ import annotations

import hashlib
import json
import math
import os
import shutil
import stat
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from planner import checks
from planner.errors import RunFolderError, SettingsError
from planner.export import RUN_FORMAT
from planner.pipeline import POLICIES, ROUTE_BUDGET, budget_moves, check_drift_scales, table_z
from planner.runfolder import (
    OPTIONAL_POLICY_ARRAYS,
    POLICY_ARRAYS,
    RUN_FORMAT_VERSION,
    run_identity,
    write_manifest,
)
from planner.settings import PlanSettings, settings_from_record
from planner.transactions import atomic_folder, run_lock

#: Keys every manifest has, and their types (checked before anything else is read).
MANIFEST_KEYS = {"format": str, "format_version": int, "input": dict, "settings": dict, "seeds": dict,
                 "versions": dict, "files": dict, "results": dict}
#: Largest manifest read back, and largest file of a run folder read back (bytes).
MAX_MANIFEST_BYTES = 16 * 2**20
MAX_MEMBER_BYTES = 4 * 2**30
#: A manifest nests four levels; anything far deeper is not one of ours.
MAX_JSON_DEPTH = 32
#: Whole numbers in a manifest have at most this many digits (a 128-bit seed has 39).
MAX_INT_DIGITS = 60

_NUMBER = (int, float)
_RESULT_SCHEMA = {"converged": bool, "message": str, "agreement": _NUMBER, "value_gap_m": (int, float, type(None)),
                  "seed_routes_matching": int, "n_seeds": int}
#: What readers of a manifest rely on, checked once on loading: a type, a tuple of types,
#: a dict of keys ("*": every member) or a one-item list (every item).
MANIFEST_SCHEMA = {
    "created_utc": str, "input": {"site": str}, "seeds": {"entropy": str}, "versions": {"*": str},
    "files": {"*": str}, "results": {"cautious": _RESULT_SCHEMA, "shortest": _RESULT_SCHEMA},
    "model": {"boundary_penalty_m": _NUMBER, "hazard_penalty_m": [_NUMBER]}, "warnings": [str],
}


def _schema_error(where: str, path: str, value, spec) -> RunFolderError:
    if isinstance(spec, dict):
        want = "an object"
    elif isinstance(spec, list):
        want = "a list"
    else:
        kinds = spec if isinstance(spec, tuple) else (spec,)
        want = " or ".join("null" if k is type(None) else "a number" if k is float else f"a {k.__name__}"
                           for k in dict.fromkeys(kinds))
    shown = "missing" if value is _MISSING else f"{type(value).__name__}"
    return RunFolderError(f"{where}: manifest key {path!r} is {shown}, expected {want}; the run folder was changed")


_MISSING = object()


def check_schema(value, spec, where: str, path: str = "") -> None:
    """Refuse ``value`` unless it has the shape ``spec`` describes (see :data:`MANIFEST_SCHEMA`)."""
    if isinstance(spec, dict):
        if not isinstance(value, dict):
            raise _schema_error(where, path, value, spec)
        for key, inner in spec.items():
            if key == "*":
                for k, v in value.items():
                    check_schema(v, inner, where, f"{path}.{k}" if path else k)
            else:
                check_schema(value.get(key, _MISSING), inner, where, f"{path}.{key}" if path else key)
        return
    if isinstance(spec, list):
        if not isinstance(value, list):
            raise _schema_error(where, path, value, spec)
        for k, v in enumerate(value):
            check_schema(v, spec[0], where, f"{path}[{k}]")
        return
    kinds = spec if isinstance(spec, tuple) else (spec,)
    if value is _MISSING or not isinstance(value, kinds) or (isinstance(value, bool) and bool not in kinds):
        raise _schema_error(where, path, value, spec)


def _strict_pairs(pairs):
    obj = dict(pairs)
    if len(obj) != len(pairs):
        seen: set = set()
        again = next(k for k, _ in pairs if k in seen or seen.add(k))
        raise ValueError(f"key {again!r} appears more than once")
    return obj


def _strict_int(text: str) -> int:
    if len(text.lstrip("-")) > MAX_INT_DIGITS:
        raise ValueError(f"a whole number of {len(text.lstrip('-')):,} digits (at most {MAX_INT_DIGITS})")
    return int(text)


def _strict_float(text: str) -> float:
    value = float(text)
    if not math.isfinite(value):
        raise ValueError(f"number {text[:30]} is out of range")
    return value


def _refuse_json_constant(name: str):
    raise ValueError(f"{name} is not a JSON number")


def _depth(value) -> int:
    """Nesting depth of a parsed JSON value (iterative: no recursion limit to hit)."""
    deepest, stack = 0, [(value, 1)]
    while stack:
        node, level = stack.pop()
        if isinstance(node, (dict, list)):
            deepest = max(deepest, level)
            if level > MAX_JSON_DEPTH:
                return level
            stack.extend((v, level + 1) for v in (node.values() if isinstance(node, dict) else node))
    return deepest


def parse_json_strict(data: bytes, where: str):
    """JSON from a run folder: UTF-8, no repeated keys, no NaN or infinities, bounded numbers and nesting."""
    try:
        value = json.loads(data.decode("utf-8"), object_pairs_hook=_strict_pairs, parse_int=_strict_int,
                           parse_float=_strict_float, parse_constant=_refuse_json_constant)
    except RecursionError as err:
        raise RunFolderError(f"{where}: nested too deeply to be ours; the run folder was changed") from err
    except (UnicodeDecodeError, ValueError) as err:  # JSONDecodeError is a ValueError
        raise RunFolderError(f"{where}: not valid JSON ({err})") from err
    if _depth(value) > MAX_JSON_DEPTH:
        raise RunFolderError(f"{where}: nested more than {MAX_JSON_DEPTH} levels deep; the run folder was changed")
    return value


def read_member(folder: Path, name: str, *, limit: int = MAX_MEMBER_BYTES) -> bytes:
    """The bytes of file ``name`` of a run folder, read once: never through a symlink, only a plain file."""
    path = folder / name
    flags = os.O_RDONLY | os.O_NOFOLLOW | getattr(os, "O_CLOEXEC", 0) | getattr(os, "O_NONBLOCK", 0)
    try:
        fd = os.open(path, flags)
    except FileNotFoundError as err:
        raise RunFolderError(f"{folder}: {name} is listed in the manifest but missing") from err
    except OSError as err:
        if os.path.islink(path):
            raise RunFolderError(f"{folder}: {name} is a symbolic link; a run folder holds plain files only, "
                                 "so it is not followed") from err
        raise RunFolderError(f"{folder}: cannot read {name} ({err.strerror or err})") from err
    try:
        info = os.fstat(fd)
        if not stat.S_ISREG(info.st_mode):
            raise RunFolderError(f"{folder}: {name} is not a plain file")
        if info.st_size > limit:
            raise RunFolderError(f"{folder}: {name} is {info.st_size:,} bytes, over the {limit:,}-byte limit "
                                 "for a run-folder file")
        chunks, total = [], 0
        while chunk := os.read(fd, 1 << 20):
            total += len(chunk)
            if total > limit:
                raise RunFolderError(f"{folder}: {name} grew past {limit:,} bytes while it was read")
            chunks.append(chunk)
        return b"".join(chunks)
    except OSError as err:
        if isinstance(err, RunFolderError):
            raise
        raise RunFolderError(f"{folder}: cannot read {name} ({err.strerror or err})") from err
    finally:
        os.close(fd)


@dataclass(frozen=True)
class Run:
    """A run folder read back and checked.

    Its manifest, settings, policies, and the bytes of every file the manifest lists
    (read once, matching their hashes).
    """

    folder: Path
    manifest: dict
    settings: PlanSettings
    arrays: dict
    blobs: dict = field(default_factory=dict, repr=False)

    @property
    def site_path(self) -> Path:
        """The run's own copy of its site file."""
        return self.folder / "site.geojson"


def load_run(folder) -> Run:
    """Read a run folder, checking its manifest schema, version and file hashes.

    Only files the manifest lists are opened, each once, never through a symlink; the
    bytes whose hash matched are the bytes every later step uses (``Run.blobs``).

    Raises
    ------
    RunFolderError
        Missing folder or manifest, another format, a newer version, a manifest that is
        not the shape veerwise writes, a file whose hash differs from the manifest
        (tampered or damaged), a listed file that is a symlink, or bad policy arrays.
    """
    folder = Path(folder)
    if not folder.is_dir():
        raise RunFolderError(f"{folder}: no such run folder")
    path = folder / "manifest.json"
    if not os.path.lexists(path):
        raise RunFolderError(f"{folder}: has no manifest.json; not a complete veerwise run folder")
    manifest = parse_json_strict(read_member(folder, "manifest.json", limit=MAX_MANIFEST_BYTES),
                                 f"{path}: manifest")
    if not isinstance(manifest, dict):
        raise RunFolderError(f"{path}: manifest is not a JSON object")
    for key, kind in MANIFEST_KEYS.items():
        value = manifest.get(key)
        if not isinstance(value, kind) or (kind is int and isinstance(value, bool)):
            raise RunFolderError(f"{path}: manifest key {key!r} is missing or not a {kind.__name__}")
    if manifest["format"] != RUN_FORMAT:
        raise RunFolderError(f"{path}: format {manifest['format'][:40]!r} is not a veerwise run")
    if manifest["format_version"] > RUN_FORMAT_VERSION:
        raise RunFolderError(
            f"{path}: run folder format {manifest['format_version']} is newer than this veerwise understands "
            f"({RUN_FORMAT_VERSION}); upgrade veerwise"
        )
    entropy = manifest["seeds"].get("entropy")
    if not (isinstance(entropy, str) and entropy.isascii() and entropy.isdigit() and len(entropy) <= 39
            and int(entropy) <= checks.MAX_SEED):
        raise RunFolderError(f"{path}: manifest seeds.entropy is missing or not a whole number in [0, 2**128)")
    check_schema(manifest, MANIFEST_SCHEMA, str(path))
    blobs = {}
    for name, digest in manifest["files"].items():
        if Path(name).name != name or name.startswith(".") or name in ("", "manifest.json") or "\x00" in name:
            raise RunFolderError(f"{path}: file entry {name[:60]!r} is not a plain file name")
        blob = read_member(folder, name)
        if hashlib.sha256(blob).hexdigest() != digest:
            raise RunFolderError(f"{folder}: {name} does not match its hash in the manifest (changed or damaged)")
        blobs[name] = blob
    for required in ("policies.npz", "site.geojson"):
        if required not in manifest["files"]:
            raise RunFolderError(f"{path}: manifest does not list {required}")
    settings = settings_from_record(manifest["settings"])
    arrays = _load_policies(folder / "policies.npz", blobs["policies.npz"])
    return Run(folder=folder, manifest=manifest, settings=settings, arrays=arrays, blobs=blobs)


def _load_policies(path: Path, data: bytes) -> dict:
    import io
    import zipfile

    try:
        with np.load(io.BytesIO(data), allow_pickle=False) as npz:
            arrays = {k: npz[k] for k in npz.files}
    except (ValueError, OSError, zipfile.BadZipFile, EOFError) as err:
        raise RunFolderError(f"{path}: cannot read policies ({err})") from err
    for key, dtype in {**POLICY_ARRAYS, **OPTIONAL_POLICY_ARRAYS}.items():
        if key not in arrays:
            if key in OPTIONAL_POLICY_ARRAYS:
                continue
            raise RunFolderError(f"{path}: missing array {key!r}")
        if arrays[key].dtype != np.dtype(dtype):
            raise RunFolderError(f"{path}: array {key!r} has dtype {arrays[key].dtype}, expected {dtype}")
    return arrays


def rebuild_grid(run: Run):
    """Site and grid of a run, rebuilt from its site copy and recorded settings.

    The run's policy arrays are checked against the grid (shape and action range).
    """
    from planner.errors import BudgetError
    from planner.grid import rasterise
    from planner.site import site_from_bytes

    s = run.settings
    try:
        site = site_from_bytes(run.blobs["site.geojson"], source=str(run.site_path), crs=s.crs, fix=s.fix)
        grid = rasterise(site, s.grid)
        check_drift_scales(grid, s.dynamics, "settings.dynamics.drift_scale", (s.dynamics.drift_scale,))
        check_drift_scales(grid, s.dynamics, "settings.drift_scales", s.drift_scales)
    except (SettingsError, BudgetError) as err:
        raise RunFolderError(f"{run.folder}: its recorded settings do not rebuild the run ({err}); the manifest "
                             "was changed") from err
    n_states, n_actions = grid.n_cells, s.dynamics.n_actions
    present = [*POLICY_ARRAYS, *(k for k in OPTIONAL_POLICY_ARRAYS if k in run.arrays)]
    for key in present:
        arr = run.arrays[key]
        expected = (n_states,) if key.startswith("greedy") else (n_states, n_actions)
        if arr.shape != expected:
            raise RunFolderError(f"{run.folder}: policy array {key!r} has shape {arr.shape}, expected {expected}")
    for key in (k for k in present if k.startswith("greedy")):
        arr = run.arrays[key]
        if arr.size and (arr.min() < 0 or arr.max() >= n_actions):
            raise RunFolderError(f"{run.folder}: policy array {key!r} holds actions outside 0..{n_actions - 1}")
    return site, grid


def rebuild(run: Run):
    """Site, grid and model of a run (see :func:`rebuild_grid`)."""
    from planner.model import build_model

    site, grid = rebuild_grid(run)
    return site, grid, build_model(grid, run.settings.dynamics)


def run_routes(run: Run, site, grid, model) -> dict:
    """The nominal routes of a run's two policies, rebuilt on its model."""
    from planner.route import build_route, nominal_path

    names = (*POLICIES, ROUTE_BUDGET) if f"greedy_{ROUTE_BUDGET}" in run.arrays else POLICIES
    return {name: build_route(name, nominal_path(model, run.arrays[f"greedy_{name}"]), grid, site, model)
            for name in names}


#: Policies ``veerwise risk`` can tabulate, and the arrays they come from.
RISK_POLICIES = {
    "cautious": "greedy_cautious", "shortest": "greedy_shortest",
    "exact on-policy": "greedy_exact_on_policy", "exact optimal": "greedy_exact_optimal",
    ROUTE_BUDGET: f"greedy_{ROUTE_BUDGET}",
}


def run_risk(run: Run, grid, *, noises, drift_scales, budget_m=None, rollouts=0, seed=None,
             policies=("cautious", "shortest"), progress=None) -> list:
    """The risk table of a run's policies at the given settings (model rebuilt per drift scale).

    ``progress``, when given, is called as ``progress(done_rows, total_rows)`` after each row.
    """
    from planner.risk import sensitivity

    checks.seed(seed, "run_risk.seed")
    check_drift_scales(grid, run.settings.dynamics, "PlanSettings.drift_scales", drift_scales)
    budget = budget_moves(run.settings.dynamics, grid.cell_m, budget_m)
    chosen = {}
    for name in policies:
        if name not in RISK_POLICIES:
            raise SettingsError(f"run_risk.policies {name!r} is not one of {', '.join(RISK_POLICIES)}")
        if RISK_POLICIES[name] not in run.arrays:
            raise SettingsError(f"run_risk.policies {name!r}: this run has no {name} route (plan it with PlanSettings.risk_budget)")
        chosen[name] = run.arrays[RISK_POLICIES[name]]
    root = np.random.SeedSequence(seed) if seed is not None else np.random.SeedSequence(
        int(run.manifest["seeds"]["entropy"]), spawn_key=(2,))
    return sensitivity(grid, run.settings.dynamics, chosen, noises=noises, drift_scales=drift_scales, budget=budget,
                       rollouts=rollouts, seed=root, progress=progress,
                       flag_z=table_z(grid, len(chosen), noises, drift_scales, budget))


def rewrite_brief(run) -> tuple[Path, Path | None]:
    """Render ``brief.html``/``brief.pdf`` again from a run folder, and update its manifest.

    Returns the two paths; the PDF's is None when this machine cannot print it (see
    :func:`planner.brief_page.pdf_unavailable`), and then no out-of-date PDF is kept.

    One transaction on the folder (``run`` is a :class:`Run` or a folder path): under
    its lock the run is read again, the briefing is rendered into a temporary sibling
    holding exactly the checked bytes of the files the manifest lists (so no figure can
    come from anywhere else), a new manifest is written there, every file the user
    added is carried over by hard link, and the new folder replaces the old in one step.
    """
    from planner.brief import BriefInputs, write_brief
    from planner.gridcheck import row_from_record

    folder = run.folder if isinstance(run, Run) else Path(run)
    with run_lock(folder) as path:
        run = load_run(path)
        site, grid, model = rebuild(run)
        routes = run_routes(run, site, grid, model)
        if "risk.json" not in run.blobs:
            raise RunFolderError(f"{path}: manifest does not list risk.json, which the briefing needs")
        records = parse_json_strict(run.blobs["risk.json"], f"{path / 'risk.json'}")
        try:
            if not (isinstance(records, list) and records and all(isinstance(r, dict) for r in records)):
                raise ValueError("expected a non-empty list of rows")
            rows = [row_from_record(r) for r in records]
        except (TypeError, KeyError, ValueError, AttributeError) as err:
            raise RunFolderError(f"{path}: cannot read risk.json ({err})") from err
        from planner.budget_plan import extras_from_records

        budget, causes = extras_from_records(records)
        manifest = dict(run.manifest)
        identity = run_identity(manifest)
        if manifest.setdefault("run_id", identity) != identity:
            raise RunFolderError(f"{path}: manifest.json was changed after the run (its run id "
                                 f"{manifest['run_id']} does not match its content, {identity})")
        listed = set(run.blobs)
        with atomic_folder(path, force=True) as tmp:
            for name, blob in run.blobs.items():
                if name not in ("brief.html", "brief.pdf"):
                    (tmp / name).write_bytes(blob)
            inputs = BriefInputs(folder=tmp, site=site, grid=grid, routes=routes, risk_rows=rows,
                                 settings=run.settings, manifest=manifest, run_name=path.name, budget=budget,
                                 causes=causes)
            _, pdf = write_brief(inputs, tmp / "brief.html", tmp / "brief.pdf")
            write_manifest(tmp, manifest)
            _carry_over(path, tmp, skip=listed | {"manifest.json", "brief.html", "brief.pdf"})
    return path / "brief.html", (path / "brief.pdf" if pdf is not None else None)


def _carry_over(old: Path, new: Path, *, skip: set) -> None:
    """Hard-link into ``new`` every entry of ``old`` that veerwise did not write.

    The user's notes, a review folder: nothing a user put in a run folder is lost when
    it is replaced. Links are made without opening or following anything.
    """
    for entry in old.iterdir():
        if entry.name in skip or os.path.lexists(new / entry.name):
            continue
        if entry.is_dir() and not entry.is_symlink():
            shutil.copytree(entry, new / entry.name, symlinks=True, copy_function=_link_or_copy)
        else:
            _link_or_copy(entry, new / entry.name)


def _link_or_copy(src, dst) -> None:
    try:
        os.link(src, dst, follow_symlinks=False)
    except OSError:
        shutil.copy2(src, dst, follow_symlinks=False)
