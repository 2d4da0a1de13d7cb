"""Stopping ``veerwise plan`` in a real process: nothing half-written, the previous state untouched.

Each test starts ``plan`` in a subprocess with its stderr on a pseudo-terminal (so the
progress display is on, and tells us where the run is), waits until the run is in the
phase under test, sends SIGINT (what Ctrl-C sends) or SIGTERM, and then checks the exit
code, the one line that says what happened, and the folder the run would have written.
Timeouts are generous: on a loaded 2-core machine a run may take several times longer.
"""

from __future__ import annotations

import hashlib
import json
import os
import pty
import re
import select
import signal
import subprocess
import sys
import time
from pathlib import Path

import pytest

pytestmark = pytest.mark.skipif(sys.platform == "win32", reason="POSIX signals and pseudo-terminals")

#: How the console script starts the command line (``veerwise`` itself may not be on PATH).
ENTRY = "from planner.cli import cli; cli()"
#: Generous upper bounds (seconds); a healthy run is far inside them.
START_TIMEOUT_S = 240.0
STOP_TIMEOUT_S = 120.0
#: Training long enough to be stopped in the middle (a few seconds per learner here),
#: and short enough that the stop, which waits for the current tenth, comes quickly.
LONG_TRAINING = ["--cell", "2", "--episodes", "1500000", "--training-runs", "2", "--rollouts", "0", "--root-seed", "1"]
#: A quick run whose writing phase we catch by its temporary sibling folder.
QUICK = ["--cell", "2", "--episodes", "2000", "--training-runs", "2", "--rollouts", "300", "--root-seed", "1"]


#: Terminal control sequences (ECMA-48 control sequences: ESC [ parameters final byte).
TERMINAL_CONTROL = re.compile(r"\x1b\[[0-?]*[ -/]*[@-~]")


def snapshot(folder: Path) -> dict:
    return {str(p.relative_to(folder)): hashlib.sha256(p.read_bytes()).hexdigest() if p.is_file() else "dir"
            for p in sorted(folder.rglob("*"))}


class PlanProcess:
    """``veerwise plan`` in a subprocess, its stderr read from a pseudo-terminal."""

    def __init__(self, args, cwd: Path, command: str = "plan"):
        master, slave = pty.openpty()
        self.proc = subprocess.Popen([sys.executable, "-c", ENTRY, command, *map(str, args)], cwd=cwd,
                                     stdin=subprocess.DEVNULL, stdout=subprocess.PIPE, stderr=slave)
        os.close(slave)
        self.master = master
        self.stderr = ""

    def _read(self, timeout: float) -> bool:
        """Read what is there; False once the other end is closed."""
        ready, _, _ = select.select([self.master], [], [], timeout)
        if not ready:
            return True
        try:
            data = os.read(self.master, 65536)
        except OSError:  # EIO: the process closed the terminal
            return False
        self.stderr += data.decode("utf-8", "replace").replace("\r\n", "\n")
        return bool(data)

    def wait_for(self, condition, what: str) -> None:
        deadline = time.monotonic() + START_TIMEOUT_S
        while not condition(self.stderr):
            if self.proc.poll() is not None:
                self._read(0.1)
                pytest.fail(f"plan ended (exit {self.proc.returncode}) before {what}:\n{self.stderr}")
            if time.monotonic() > deadline:
                self.proc.kill()
                pytest.fail(f"plan did not reach {what} within {START_TIMEOUT_S:.0f} s:\n{self.stderr}")
            self._read(0.01)

    def stop(self, signum) -> tuple[int, str, str]:
        """Send ``signum``; return exit code, stdout and stderr once the process has ended."""
        self.proc.send_signal(signum)
        deadline = time.monotonic() + STOP_TIMEOUT_S
        while self._read(0.1):
            if time.monotonic() > deadline:
                self.proc.kill()
                pytest.fail(f"plan did not stop within {STOP_TIMEOUT_S:.0f} s of the signal:\n{self.stderr}")
            if self.proc.poll() is not None:
                self._read(0.1)
                break
        code = self.proc.wait(timeout=STOP_TIMEOUT_S)
        stdout = self.proc.stdout.read().decode()
        self.proc.stdout.close()
        os.close(self.master)
        return code, stdout, self.stderr


def training(text: str) -> bool:
    # The first tenth of SARSA's episodes is done: the learners are running.
    return "training SARSA" in text and "%" in text.split("training SARSA", 1)[1]


def writing(folder: Path, name: str):
    def condition(_text: str) -> bool:
        return any(p.name.startswith(f".{name}.partial-") for p in folder.iterdir())
    return condition


@pytest.fixture
def site(site_file) -> Path:
    return site_file


def assert_stopped(code, stdout, stderr, signum=signal.SIGINT):
    # 128 + the signal's number, as shells report a command a signal ended: 130 SIGINT, 143 SIGTERM.
    assert code == {signal.SIGINT: 130, signal.SIGTERM: 143}[signum], stderr
    assert stdout == ""
    assert "Traceback" not in stderr
    # The progress display draws with terminal control sequences; what it leaves is lines
    drawn = re.split(r"[\r\n]", TERMINAL_CONTROL.sub("", stderr))
    ours = [line for line in drawn if line.startswith("veerwise:")]
    assert len(ours) == 1, stderr
    assert "stopped" in ours[0] and "nothing was written" in ours[0], ours[0]
    # Everything else on stderr is the progress display (each line "[  1.2 s] ...") or blank.
    others = [line for line in drawn if line.strip() and not line.startswith("veerwise:")]
    assert all(line.startswith("[") for line in others), stderr


@pytest.mark.parametrize("signum", [signal.SIGINT, signal.SIGTERM], ids=["SIGINT", "SIGTERM"])
def test_stopped_while_training_leaves_no_trace(tmp_path, site, signum):
    before = snapshot(tmp_path)
    run = PlanProcess([site, tmp_path / "run", *LONG_TRAINING], tmp_path)
    run.wait_for(training, "the middle of training")
    assert_stopped(*run.stop(signum), signum)
    assert not (tmp_path / "run").exists()
    assert snapshot(tmp_path) == before


@pytest.mark.parametrize("signum", [signal.SIGINT, signal.SIGTERM], ids=["SIGINT", "SIGTERM"])
def test_stopped_while_writing_leaves_no_trace(tmp_path, site, signum):
    before = snapshot(tmp_path)
    run = PlanProcess([site, tmp_path / "run", *QUICK], tmp_path)
    run.wait_for(writing(tmp_path, "run"), "writing its temporary folder")
    code, stdout, stderr = run.stop(signum)
    assert_stopped(code, stdout, stderr, signum)
    assert f"while writing {tmp_path / 'run'}" in stderr
    assert not (tmp_path / "run").exists()
    assert snapshot(tmp_path) == before


def _previous_run(folder: Path) -> None:
    """A stand-in for an earlier run folder: some files, one of them large, and a subfolder."""
    folder.mkdir()
    (folder / "manifest.json").write_text(json.dumps({"format": "veerwise-run", "note": "earlier run"}))
    (folder / "policies.npz").write_bytes(os.urandom(300_000))
    (folder / "notes").mkdir()
    (folder / "notes" / "review.txt").write_text("signed off 2026-11-30\n")


@pytest.mark.parametrize("phase,signum", [("writing", signal.SIGINT), ("training", signal.SIGTERM)],
                         ids=["SIGINT while writing", "SIGTERM while training"])
def test_stopped_with_force_leaves_the_previous_folder_byte_identical(tmp_path, site, phase, signum):
    out = tmp_path / "run"
    _previous_run(out)
    before = snapshot(tmp_path)
    settings = QUICK if phase == "writing" else LONG_TRAINING
    run = PlanProcess([site, out, "--force", *settings], tmp_path)
    if phase == "writing":
        run.wait_for(writing(tmp_path, "run"), "writing its temporary folder")
    else:
        run.wait_for(training, "the middle of training")
    assert_stopped(*run.stop(signum), signum)
    assert snapshot(tmp_path) == before
