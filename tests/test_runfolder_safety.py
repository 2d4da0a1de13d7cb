"""A run folder that nothing can corrupt: locking, atomic replacement, recovery, and
readers that open only what the manifest lists.

Faults that need a process (a concurrent run, a kill, a signal) run ``veerwise`` in a
real subprocess; the rest use click's runner with the fault injected. Each test states
the guarantee it checks in its name.
"""

from __future__ import annotations

import errno
import hashlib
import json
import os
import shutil
import signal
import sys
from pathlib import Path

import numpy as np
import pytest
from click.testing import CliRunner
from conftest import small_site_dict
from test_interrupt import LONG_TRAINING, PlanProcess, assert_stopped, snapshot, training, writing

from planner.cli import cli

pytestmark = pytest.mark.skipif(sys.platform == "win32", reason="POSIX signals, locks and renames")

QUICK = ["--cell", "2", "--episodes", "200", "--training-runs", "1", "--rollouts", "0", "--table-noises", "0.1",
         "--table-drifts", "1", "--root-seed", "3", "-q"]
UNSEEDED = [o for o in QUICK if o not in ("--root-seed", "3")]


def invoke(*args):
    return CliRunner().invoke(cli, [str(a) for a in args])


def one_error_line(result) -> str:
    assert "Traceback" not in result.output, result.output
    assert result.exit_code == 2, result.output
    lines = [line for line in result.stderr.splitlines() if line.strip()]
    assert len(lines) == 1 and lines[0].startswith("veerwise: error: "), result.stderr
    return lines[0]


def warnings_of(result) -> list[str]:
    return [line for line in result.stderr.splitlines() if line.startswith("veerwise: warning: ")]


@pytest.fixture(scope="module")
def made_run(tmp_path_factory):
    """A complete run folder of the small test site (copied by each test that changes it)."""
    root = tmp_path_factory.mktemp("made")
    site = root / "site.geojson"
    site.write_text(json.dumps(small_site_dict()))
    result = invoke("plan", site, root / "run", *QUICK)
    assert result.exit_code == 0, result.output
    return root / "run"


@pytest.fixture
def run_copy(made_run, tmp_path) -> Path:
    folder = tmp_path / "run"
    shutil.copytree(made_run, folder)
    return folder


@pytest.fixture
def site(site_file) -> Path:
    return site_file


def rehash(folder: Path, name: str) -> None:
    path = folder / "manifest.json"
    manifest = json.loads(path.read_text())
    manifest["files"][name] = hashlib.sha256((folder / name).read_bytes()).hexdigest()
    path.write_text(json.dumps(manifest))


# ----------------------------------------------------------------------------- data loss


def test_a_second_plan_to_the_same_folder_is_refused_while_the_first_runs(tmp_path, site):
    out = tmp_path / "run"
    first = PlanProcess([site, out, *LONG_TRAINING], tmp_path)
    first.wait_for(training, "the middle of training")
    line = one_error_line(invoke("plan", site, out, "--force", *QUICK))
    assert "in use by another veerwise command" in line and f"pid {first.proc.pid}" in line, line
    assert_stopped(*first.stop(signal.SIGINT))
    assert not out.exists()
    assert sorted(p.name for p in tmp_path.iterdir()) == ["site.geojson"]


@pytest.mark.parametrize("target,options", [
    ("run/manifest.json", []),
    ("run/routes-cautious.geojson", ["--policy", "cautious"]),
    ("run/waypoints.csv", ["--format", "csv"]),  # would write run/waypoints-cautious.csv and -shortest.csv
    ("link-to-manifest.json", []),
], ids=["the manifest", "its own route file", "its own waypoint files by name", "a symlink into it"])
def test_export_never_writes_into_a_run_folder(run_copy, tmp_path, target, options):
    (tmp_path / "link-to-manifest.json").symlink_to(run_copy / "manifest.json")
    before = snapshot(run_copy)
    line = one_error_line(invoke("export", run_copy, *options, "-o", tmp_path / target))
    assert "inside the run folder" in line, line
    assert snapshot(run_copy) == before
    assert invoke("risk", run_copy, "--rollouts", "0").exit_code == 0


@pytest.mark.parametrize("signum", [signal.SIGINT, signal.SIGTERM], ids=["SIGINT", "SIGTERM"])
def test_a_stopped_brief_leaves_the_run_folder_as_it_was(run_copy, tmp_path, signum):
    before = snapshot(tmp_path)
    brief = PlanProcess([run_copy], tmp_path, command="brief")
    brief.wait_for(writing(tmp_path, "run"), "rendering into its temporary folder")
    code, stdout, stderr = brief.stop(signum)
    assert_stopped(code, stdout, stderr, signum)
    assert snapshot(tmp_path) == before


def test_a_killed_run_is_cleaned_up_by_the_next_with_notes(tmp_path, site):
    out = tmp_path / "run"
    killed = PlanProcess([site, out, *QUICK[:-1]], tmp_path)
    killed.wait_for(writing(tmp_path, "run"), "writing its temporary folder")
    killed.proc.kill()
    killed.proc.wait(timeout=60)
    left = sorted(p.name for p in tmp_path.iterdir() if p.name.startswith("."))
    assert any(n.startswith(".run.partial-") for n in left) and ".run.lock" in left, left
    result = invoke("plan", site, out, *QUICK)
    assert result.exit_code == 0, result.output
    notes = warnings_of(result)
    assert any("took over the lock" in n and f"pid {killed.proc.pid}" in n for n in notes), notes
    assert any("removed .run.partial-" in n for n in notes), notes
    assert sorted(p.name for p in tmp_path.iterdir()) == ["run", "site.geojson"]


def test_an_interrupted_two_step_replacement_is_put_back(run_copy, tmp_path):
    # Where the system cannot swap two folders in one step, the old run is set aside first;
    # a stop between the two renames leaves it under its hidden name, and the next command repairs that.
    aside = tmp_path / ".run.old-4242-0000"
    run_copy.rename(aside)
    result = invoke("brief", run_copy)
    assert result.exit_code == 0, result.output
    assert any("put back the previous run folder" in n for n in warnings_of(result)), result.stderr
    assert not aside.exists() and (run_copy / "manifest.json").is_file()
    assert invoke("risk", run_copy, "--rollouts", "0").exit_code == 0


def test_force_never_leaves_the_folder_missing(run_copy, site, monkeypatch):
    """Every rename during a --force replacement keeps a complete run folder at its path."""
    missing = []
    for name in ("rename", "replace"):
        original = getattr(os, name)

        def spy(src, dst, *args, _original=original, **kwargs):
            _original(src, dst, *args, **kwargs)
            if not (run_copy / "manifest.json").is_file():
                missing.append((src, dst))

        monkeypatch.setattr(os, name, spy)
    result = invoke("plan", site, run_copy, "--force", *UNSEEDED, "--root-seed", "4")
    monkeypatch.undo()
    assert result.exit_code == 0, result.output
    assert missing == []
    assert json.loads((run_copy / "manifest.json").read_text())["settings"]["seed"] == 4


def test_force_refuses_to_replace_a_folder_of_user_files(tmp_path, site, monkeypatch, no_heavy_work):
    (tmp_path / "notes.txt").write_text("mine")
    monkeypatch.chdir(tmp_path)
    before = snapshot(tmp_path)
    line = one_error_line(invoke("plan", site, ".", "--force", *QUICK))
    assert "not a veerwise run folder" in line, line
    assert snapshot(tmp_path) == before


def test_a_full_disk_is_one_line_and_leaves_nothing(tmp_path, site, monkeypatch):
    import planner.runfolder

    def full(path, arrays):
        raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC), str(path))

    monkeypatch.setattr(planner.runfolder, "_save_npz", full)
    line = one_error_line(invoke("plan", site, tmp_path / "run", *QUICK))
    assert os.strerror(errno.ENOSPC) in line and "nothing was written" in line, line
    assert sorted(p.name for p in tmp_path.iterdir()) == ["site.geojson"]


def test_a_read_only_folder_is_one_line(tmp_path, site):
    folder = tmp_path / "locked"
    folder.mkdir()
    folder.chmod(0o555)
    try:
        probe = folder / "probe"
        try:
            probe.write_text("")
        except OSError:
            pass
        else:
            probe.unlink()
            pytest.skip("this user can write into a read-only folder (root): nothing to test")
        line = one_error_line(invoke("plan", site, folder / "run", *QUICK))
        assert "nothing was written" in line, line
        assert list(folder.iterdir()) == []
    finally:
        folder.chmod(0o755)


def test_memory_running_out_anywhere_is_one_line(tmp_path, site, monkeypatch):
    import planner.model

    def exhausted(*args, **kwargs):
        raise MemoryError

    monkeypatch.setattr(planner.model, "build_model", exhausted)
    line = one_error_line(invoke("plan", site, tmp_path / "run", *QUICK))
    assert "out of memory" in line and "--cell" in line, line
    assert sorted(p.name for p in tmp_path.iterdir()) == ["site.geojson"]


def test_a_plan_larger_than_the_memory_is_refused_with_its_estimate(tmp_path, site, monkeypatch, no_heavy_work):
    import planner.settings

    monkeypatch.setattr(planner.settings, "available_memory_bytes", lambda: 2**20, raising=False)
    line = one_error_line(invoke("plan", site, tmp_path / "run", *QUICK[:2], "--episodes", "5000000",
                                 *QUICK[4:]))
    assert "would need about" in line and "learning curves" in line and "--episodes" in line, line


# ----------------------------------------------------------------------------- integrity


def test_the_site_copy_is_the_bytes_that_were_hashed(tmp_path, site, monkeypatch):
    import planner.pipeline

    original = site.read_bytes()
    compute = planner.pipeline.compute_plan

    def edited_meanwhile(*args, **kwargs):
        result = compute(*args, **kwargs)
        site.write_text(site.read_text().replace("Gravel", "Sand  "))  # someone saves the file mid-run
        return result

    monkeypatch.setattr(planner.pipeline, "compute_plan", edited_meanwhile)
    out = tmp_path / "run"
    result = invoke("plan", site, out, *QUICK)
    assert result.exit_code == 0, result.output
    manifest = json.loads((out / "manifest.json").read_text())
    copied = (out / "site.geojson").read_bytes()
    assert copied == original
    assert hashlib.sha256(copied).hexdigest() == manifest["input"]["sha256"]


# ----------------------------------------------------------------------------- reading only what is listed


def test_brief_never_follows_a_symlink_in_the_run_folder(run_copy, tmp_path):
    secret = tmp_path / "secret.png"
    secret.write_bytes((run_copy / "routes.png").read_bytes() + b"SECRET-MARKER")
    (run_copy / "routes.png").unlink()
    (run_copy / "routes.png").symlink_to(secret)
    rehash(run_copy, "routes.png")
    html = (run_copy / "brief.html").read_bytes()
    line = one_error_line(invoke("brief", run_copy))
    assert "routes.png is a symbolic link" in line, line
    assert (run_copy / "brief.html").read_bytes() == html


@pytest.mark.parametrize("command", ["risk", "export", "brief"])
def test_a_listed_file_replaced_by_a_symlink_is_refused(run_copy, tmp_path, command):
    moved = tmp_path / "policies.npz"
    (run_copy / "policies.npz").rename(moved)
    (run_copy / "policies.npz").symlink_to(moved)
    args = {"risk": ["--rollouts", "0"], "export": ["-o", tmp_path / "w.geojson"], "brief": []}[command]
    line = one_error_line(invoke(command, run_copy, *args))
    assert "policies.npz is a symbolic link" in line, line


def test_brief_keeps_the_files_a_user_added(run_copy):
    (run_copy / "review").mkdir()
    (run_copy / "review" / "sign-off.txt").write_text("signed 2026-12-01")
    (run_copy / "notes.txt").write_text("wind picked up at 14:00")
    result = invoke("brief", run_copy)
    assert result.exit_code == 0, result.output
    assert (run_copy / "review" / "sign-off.txt").read_text() == "signed 2026-12-01"
    assert (run_copy / "notes.txt").read_text() == "wind picked up at 14:00"
    assert "notes.txt" not in json.loads((run_copy / "manifest.json").read_text())["files"]


# ----------------------------------------------------------------------------- seeds


def test_a_run_made_without_a_seed_can_be_made_again_from_its_manifest(tmp_path, site):
    quick = UNSEEDED
    first, second = tmp_path / "first", tmp_path / "second"
    assert invoke("plan", site, first, *quick).exit_code == 0
    entropy = json.loads((first / "manifest.json").read_text())["seeds"]["entropy"]
    result = invoke("plan", site, second, *quick, "--root-seed", entropy)
    assert result.exit_code == 0, result.output
    for name in ("policies.npz", "risk.json", "waypoints-cautious.csv", "routes-shortest.geojson"):
        assert (first / name).read_bytes() == (second / name).read_bytes(), name
    with np.load(first / "policies.npz") as a, np.load(second / "policies.npz") as b:
        assert all(np.array_equal(a[k], b[k]) for k in a.files)


@pytest.mark.parametrize("seed,accepted", [(-1, False), (0, True), (2**100, True), (2**128 - 1, True),
                                           (2**128, False)])
def test_plan_and_risk_agree_on_which_seeds_are_valid(made_run, tmp_path, site, seed, accepted, no_heavy_work):
    risk = invoke("risk", made_run, "--rollouts", "0", "--rollout-seed", seed)
    plan = invoke("plan", site, tmp_path / "run", *UNSEEDED, "--root-seed", seed)
    if accepted:
        assert risk.exit_code == 0, risk.output
        assert "heavy work" in repr(plan.exception)  # got past every check of the settings
    else:
        for result in (risk, plan):
            line = one_error_line(result)
            # A negative seed is refused by the option's own range, one too large by the seed rule.
            assert ("--root-seed" in line or "--rollout-seed" in line) and ("2**128" in line or "x>=0" in line), line


# ----------------------------------------------------------------------------- no quadratic steps


def test_a_site_of_many_zones_is_projected_with_one_transformer(monkeypatch):
    """Making a pyproj transformer costs milliseconds: one per zone made 8,000 zones take minutes."""
    import pyproj
    from conftest import feature, rect

    from planner.site import site_from_geojson

    data = small_site_dict()
    data["features"] += [feature("drift", "Polygon", rect(1 + i % 9 * 1.1, 1 + i // 9 * 1.1, 1.9 + i % 9 * 1.1,
                                                          1.9 + i // 9 * 1.1), name=f"d{i}", toward_deg=90.0,
                                 drift_per_m=0.1) for i in range(150)]
    made = []
    original = pyproj.Transformer.from_crs

    def counting(*args, **kwargs):
        made.append(args)
        return original(*args, **kwargs)

    monkeypatch.setattr(pyproj.Transformer, "from_crs", staticmethod(counting))
    site = site_from_geojson(data)
    assert len(site.drifts) == 151
    assert len(made) <= 2, f"{len(made)} transformers for {len(data['features'])} features"
