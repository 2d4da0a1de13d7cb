"""The run folder: written whole or not at all.

A :class:`planner.pipeline.PlanResult` stored as files, with the manifest (inputs with
hashes, every setting, seeds, versions, and the hash of every file written) and the run
id. Reading a run folder back, with its checks, is :mod:`planner.runload`; locking and
the atomic replacement of a folder are :mod:`planner.transactions`.
"""

from __future__ import annotations

import hashlib
import json
import platform
import time
from pathlib import Path

import numpy as np

from planner import __version__
from planner.errors import RunFolderError
from planner.export import RUN_FORMAT
from planner.pipeline import METHOD_NAMES, POLICIES, ROUTE_BUDGET, PlanResult, budget_moves
from planner.progress import Progress
from planner.settings import PlanSettings, settings_record
from planner.transactions import atomic_folder

#: What the manifest says it is (``RUN_FORMAT``, from the export stage's file helpers);
#: a run folder without it is refused.
#: Version of the run-folder layout; newer folders are refused by older code.
RUN_FORMAT_VERSION = 1
#: Arrays stored in ``policies.npz`` and their dtypes (checked on load).
POLICY_ARRAYS = {
    "greedy_cautious": "int64", "greedy_shortest": "int64",
    "greedy_exact_on_policy": "int64", "greedy_exact_optimal": "int64",
    "q_cautious": "float64", "q_shortest": "float64",
    "q_exact_on_policy": "float64", "q_exact_optimal": "float64",
}
#: Arrays ``policies.npz`` holds only for some runs (checked like the others when present).
OPTIONAL_POLICY_ARRAYS = {f"greedy_{ROUTE_BUDGET}": "int64"}


def versions() -> dict:
    """Versions of Python, veerwise and every library a result depends on."""
    from importlib.metadata import version

    import pyproj

    out = {"veerwise": __version__, "python": platform.python_version()}
    for name in ("numpy", "scipy", "shapely", "pyproj", "numba", "matplotlib", "click"):
        out[name] = version(name)
    out["proj"] = pyproj.proj_version_str
    out["platform"] = platform.platform()
    return out


def sha256_file(path) -> str:
    """SHA-256 of a file's bytes, as hex."""
    h = hashlib.sha256()
    with open(path, "rb") as f:
        for chunk in iter(lambda: f.read(1 << 20), b""):
            h.update(chunk)
    return h.hexdigest()


# ----------------------------------------------------------------------------- writing


def write_run(result: PlanResult, settings: PlanSettings, site_path, out, *, force: bool = False,
              progress: Progress | None = None) -> Path:
    """Write the run folder of ``result`` to ``out``, whole or not at all."""
    progress = progress or Progress()
    out = Path(out)
    with atomic_folder(out, force=force) as tmp:
        _write_contents(result, settings, site_path, tmp, progress, out.name)
    return out


def _write_contents(result: PlanResult, settings: PlanSettings, site_path, folder: Path, progress,
                    run_name: str) -> None:
    from planner import plots, plots_learning, plots_risk
    from planner.brief import BriefInputs, write_brief
    from planner.export import write_csv, write_geojson
    from planner.risk import risk_map
    from planner.risk_table import format_table

    # The bytes that were hashed and parsed, not the file again: it may have changed since.
    data = result.site.data
    if not data:
        raise RunFolderError(f"{result.site.source}: the site was not read from a file, so there are no bytes to "
                             "copy into the run folder; load it with planner.site.load_site")
    if hashlib.sha256(data).hexdigest() != result.site.sha256:
        raise RunFolderError(f"{site_paths_text(site_path)}: the site's bytes in memory do not match its hash; "
                             "nothing was written")
    (folder / "site.geojson").write_bytes(data)
    arrays = {
        "greedy_cautious": result.greedy["cautious"].astype(np.int64),
        "greedy_shortest": result.greedy["shortest"].astype(np.int64),
        "greedy_exact_on_policy": result.references["cautious"].greedy.astype(np.int64),
        "greedy_exact_optimal": result.references["shortest"].greedy.astype(np.int64),
        "q_cautious": result.learned["cautious"].q_mean, "q_shortest": result.learned["shortest"].q_mean,
        "q_exact_on_policy": result.exact["cautious"].q, "q_exact_optimal": result.exact["shortest"].q,
    }
    if ROUTE_BUDGET in result.greedy:
        arrays[f"greedy_{ROUTE_BUDGET}"] = result.greedy[ROUTE_BUDGET].astype(np.int64)
    _save_npz(folder / "policies.npz", arrays)
    from planner.learn import learning_curves

    _save_npz(folder / "training.npz", {
        f"{name}_{key}": value for name in POLICIES for key, value in learning_curves(result.learned[name]).items()
    })
    progress("writing waypoint files and the risk table")
    for name in result.routes:
        write_geojson(result.routes[name], folder / f"routes-{name}.geojson", site=result.site, alt_m=settings.alt_m)
        write_csv(result.routes[name], folder / f"waypoints-{name}.csv", alt_m=settings.alt_m)
    (folder / "risk.csv").write_text(format_table(result.risk_rows, "csv"))
    noise = settings.learn.epsilon
    if result.budget is None:
        (folder / "risk.json").write_text(format_table(result.risk_rows, "json"))
    else:
        from planner.budget_plan import risk_records

        records = risk_records(result.risk_rows, noise=noise, drift_scale=settings.dynamics.drift_scale,
                               budget=result.budget_record, causes=result.causes)
        (folder / "risk.json").write_text(json.dumps(records, sort_keys=True, indent=2, allow_nan=False) + "\n")
    with progress.task("figures", 4 if result.budget is None else 6) as report:
        plots_learning.plot_learning(result.learned, folder / "learning.png",
                                     title=f"{result.site.name} - learning curves")
        report(1)
        plots.plot_routes(result.site, result.grid, result.routes, folder / "routes.png")
        report(2)
        maps = {}
        from planner.model import epsilon_greedy

        for name in result.routes:
            probs = epsilon_greedy(result.greedy[name], result.model.n_actions, noise)
            maps[name] = risk_map(result.model, probs)
        plots_risk.plot_risk_maps(result.site, result.grid, maps, result.routes, folder / "riskmap.png", noise=noise)
        report(3)
        plots_risk.plot_sensitivity(result.risk_rows, folder / "sensitivity.png",
                                    title=f"{result.site.name} - incident probability under worse execution and wind")
        if result.budget is not None:
            from planner import plots_budget

            report(4)
            plots_budget.plot_tradeoff(result.budget_record, result.causes, folder / "tradeoff.png",
                                       title=f"{result.site.name} - length against risk")
            report(5)
            plots_budget.plot_causes(result.site, result.grid, result.routes, result.causes,
                                     folder / "failure-paths.png")
    manifest = build_manifest(result, settings, site_path, folder)
    # the run id covers every file but the briefing, which prints it
    manifest["files"] = file_hashes(folder)
    manifest["run_id"] = run_identity(manifest)
    with progress.task("briefing (HTML, then PDF)"):
        write_brief(BriefInputs(folder=folder, site=result.site, grid=result.grid, routes=result.routes,
                                risk_rows=result.risk_rows, settings=settings, manifest=manifest, run_name=run_name,
                                budget=result.budget_record, causes=result.causes),
                    folder / "brief.html", folder / "brief.pdf")
    write_manifest(folder, manifest)


#: Files the run id does not cover: the briefing prints the id, so it cannot be hashed into it.
RUN_ID_OMITS_FILES = ("brief.html", "brief.pdf")
#: Manifest entries the run id does not cover: when and how fast a run was made, not what it holds.
RUN_ID_OMITS_KEYS = ("run_id", "created_utc", "timings_s")


def run_identity(manifest: dict) -> str:
    """The run id: 12 hex digits of SHA-256 over the manifest as canonical JSON.

    The manifest is hashed without ``run_id`` itself, the clock entries
    (``created_utc``, ``timings_s``) and the hashes of ``brief.html`` / ``brief.pdf``
    (which print the id), so it is known when the briefing is written, covers the
    inputs, settings, seeds, versions and the hash of every result file, and is the
    same for two runs that hold the same results. ``veerwise brief`` re-renders a
    briefing with the same id.
    """
    kept = {k: v for k, v in manifest.items() if k not in RUN_ID_OMITS_KEYS}
    kept["files"] = {k: v for k, v in manifest.get("files", {}).items() if k not in RUN_ID_OMITS_FILES}
    canonical = json.dumps(kept, sort_keys=True, separators=(",", ":"), ensure_ascii=True)
    return hashlib.sha256(canonical.encode("ascii")).hexdigest()[:12]


def file_hashes(folder: Path) -> dict:
    """SHA-256 of every file of a run folder (not the manifest, not hidden files), by name."""
    return {p.name: sha256_file(p) for p in sorted(Path(folder).iterdir())
            if p.is_file() and not p.is_symlink() and p.name != "manifest.json" and not p.name.startswith(".")}


def write_manifest(folder: Path, manifest: dict) -> None:
    """Record the hash of every file in the folder, then write ``manifest.json`` atomically."""
    from planner.export import atomic_output

    manifest["files"] = file_hashes(folder)
    with atomic_output(folder / "manifest.json", guard=False) as tmp:
        tmp.write_text(json.dumps(manifest, indent=2, sort_keys=True) + "\n")


def _save_npz(path: Path, arrays: dict) -> None:
    """Deterministic .npz: fixed member order and time stamps, so equal arrays give equal bytes."""
    import io
    import zipfile

    with zipfile.ZipFile(path, "w", compression=zipfile.ZIP_DEFLATED) as zf:
        for name in sorted(arrays):
            buf = io.BytesIO()
            np.lib.format.write_array(buf, np.ascontiguousarray(arrays[name]), allow_pickle=False)
            info = zipfile.ZipInfo(f"{name}.npy", date_time=(1980, 1, 1, 0, 0, 0))
            info.compress_type = zipfile.ZIP_DEFLATED
            zf.writestr(info, buf.getvalue())


def _verdict_record(verdict, reference) -> dict | None:
    """The risk verdict and the reference's tie range, as plain data for the manifest."""
    if verdict is None:
        return None

    def num(x):
        return None if not np.isfinite(x) else float(x)

    return {
        "converged": bool(verdict.converged), "p_incident": num(verdict.p_incident),
        "reference_p_incident": num(verdict.reference_low), "reference_p_incident_max": num(verdict.reference_high),
        "band": [num(verdict.band_low), num(verdict.band_high)],
        "expected_length_m": num(verdict.length_m), "reference_expected_length_m": num(verdict.reference_length_m),
        "seeds_p_incident": [num(verdict.seeds_low), num(verdict.seeds_high)],
        "tied_states": int(reference.n_tied_states), "message": verdict.message,
    }


def site_paths_text(site_path) -> str:
    """The site file, or the files merged into the site (joined by ' + '), as the manifest names them."""
    if isinstance(site_path, (str, Path)):
        return str(site_path)
    return " + ".join(str(p) for p in site_path)


def build_manifest(result: PlanResult, settings: PlanSettings, site_path, folder: Path) -> dict:
    """The manifest: inputs with hashes, settings, seeds, versions, results in brief."""
    root = result.root_seed
    summary = {}
    for name in POLICIES:
        route, conv = result.routes[name], result.convergence[name]
        learned = result.learned[name]
        summary[name] = {
            "method": learned.method, "reached_goal": route.reached_goal, "moves": route.n_moves,
            "length_m": round(route.length_m, 3), "waypoints": len(route.waypoints),
            "converged": conv.converged, "agreement": round(conv.agreement, 6),
            "value_gap_m": None if not np.isfinite(conv.value_gap_m) else round(conv.value_gap_m, 6),
            "seed_routes_matching": conv.seed_routes_matching, "n_seeds": conv.n_seeds, "message": conv.message,
            "episodes": learned.settings.episodes, "max_steps": learned.max_steps,
            "schedule": learned.settings.schedule, "updates": int(learned.steps_total),
            "sweep_horizon": learned.settings.sweep_horizon,
            "sweeps": int(learned.n_sweeps), "stopped_by_rule": bool(learned.stopped_by_rule),
            "checks": {"updates": [int(u) for u in learned.check_updates],
                       "p_incident": [None if not np.isfinite(p) else float(p) for p in learned.check_p_incident]},
            "delivered": f"learned ({METHOD_NAMES[learned.method]}), "
                         f"{'converged' if conv.converged else 'not converged'}",
            "verdict": _verdict_record(conv.verdict, result.references[name]),
            "p_incident_seeds": [float(p) for p in result.seed_p_incident.get(name, ())],
            **({"p_incident_seeds_strong": {"drift_scale": result.seed_p_incident_strong[name][0],
                                            "values": [float(p) for p in result.seed_p_incident_strong[name][1]]}}
               if name in result.seed_p_incident_strong else {}),
        }
    exact = {name: {"iterations": sol.iterations, "residual": sol.residual, "epsilon": sol.epsilon}
             for name, sol in result.exact.items()}
    return {
        "format": RUN_FORMAT,
        "format_version": RUN_FORMAT_VERSION,
        "created_utc": time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime()),
        "notice": "For simulation and review only; not approved for field operation. Follow the site's safety "
                  "rules, certified operators and local regulations.",
        "input": {"site": site_paths_text(site_path), "site_copy": "site.geojson", "sha256": result.site.sha256,
                  "name": result.site.name,
                  "files": [{"path": path, "sha256": digest} for path, digest in result.site.inputs]},
        "settings": settings_record(settings),
        "seeds": {"entropy": str(root.entropy), "spawn": {"cautious": 0, "shortest": 1, "risk": 2},
                  "given": settings.seed},
        "versions": versions(),
        "grid": {"rows": result.grid.shape[0], "cols": result.grid.shape[1], "cell_m": result.grid.cell_m,
                 "x0": result.grid.x0, "y0": result.grid.y0, "crs": result.site.frame.crs},
        "motion": {"cell_m": result.grid.cell_m, "move_m": settings.dynamics.move_length_m(result.grid.cell_m),
                   "headings": settings.dynamics.n_actions,
                   "budget_moves": budget_moves(settings.dynamics, result.grid.cell_m, settings.budget_m)},
        "grid_check": [c.as_dict() for c in result.grid_checks],
        "model": {"outcomes": result.model.n_outcomes, "bytes": result.model.nbytes,
                  "hazard_penalty_m": [float(p) for p in result.model.penalty_m],
                  "boundary_penalty_m": result.model.boundary_penalty_m, "warnings": list(result.model.warnings)},
        "warnings": list(result.site.warnings) + list(result.grid.warnings) + list(result.model.warnings),
        "results": summary,
        **({"risk_budget": {k: v for k, v in result.budget_record.items() if k != "curve"}}
           if result.budget_record is not None else {}),
        "exact": exact,
        "timings_s": {k: round(v, 3) for k, v in result.timings.items()},
    }
