"""Checkpoint and resume: an interrupted run (exception after a round; SIGINT/SIGTERM to the command line)
resumes from its last complete round and ends at the uninterrupted schedule; damaged, foreign or missing
checkpoints give a clear error, never a traceback.

The solves are deterministic and the method's state and warm starts are restored exactly, so schedules are
compared exactly (to 1e-12 relative, i.e. bit for bit up to printing).
"""

from __future__ import annotations

import json
import os
import signal
import subprocess
import sys
import time
from dataclasses import replace
from pathlib import Path

import numpy as np
import pytest

from negotiate.checkpoint import FILENAME, CheckpointError, fleet_digest, read_checkpoint
from negotiate.cli import main
from negotiate.fleet import build_agents, load_fleet
from negotiate.run import run_fleet

EXAMPLES = Path(__file__).resolve().parent.parent / "examples"
ROOT = EXAMPLES.parent


class Interrupt(Exception):
    pass


def _stop_after(n: int):
    seen = [0]

    def progress(rec):
        seen[0] += 1
        if seen[0] == n:
            raise Interrupt

    return progress


def _rel(a: np.ndarray, b: np.ndarray) -> float:
    return float(np.max(np.abs(a - b) / np.maximum(1.0, np.abs(b))))


@pytest.fixture(scope="module")
def cell():
    """The shipped machining cell (invented data; swap order search: 21 order trials) and its plain run."""
    spec = load_fleet(EXAMPLES / "machining_cell.toml")
    agents = build_agents(spec)
    return spec, agents, run_fleet(spec, agents)


@pytest.fixture(scope="module")
def depot_reference(tmp_path_factory):
    """The shipped charging depot (invented data) run uninterrupted by the command line."""
    fleet = EXAMPLES / "charging_depot.toml"
    ref_dir = tmp_path_factory.mktemp("depot-reference")
    assert main(["run", str(fleet), "--out", str(ref_dir), "--quiet"]) in (0, 3)
    return fleet, ref_dir


class TestResume:
    @pytest.mark.parametrize("records", [1, 20])
    def test_interrupted_after_a_round(self, cell, tmp_path, records):
        """Stopped after the first record (in the first trial) or after 20 (mid-search), the resumed run
        skips the finished trials and ends at the same schedule, history and solve count."""
        spec, agents, ref = cell
        with pytest.raises(Interrupt):
            run_fleet(spec, agents, checkpoint_dir=tmp_path, progress=_stop_after(records))
        saved = read_checkpoint(tmp_path, fleet_digest(spec, spec.coordinator.method))
        assert saved.current is not None
        res = run_fleet(spec, build_agents(spec), checkpoint_dir=tmp_path, resume=True)
        c, r = res.coordination, ref.coordination
        assert _rel(c.P, r.P) <= 1e-12
        assert (c.rounds, c.agent_solves, len(res.order_trials)) == (r.rounds, r.agent_solves, len(ref.order_trials))
        assert [h.trial_total for h in c.history] == [h.trial_total for h in r.history]
        assert res.coordination.evaluation.reports[0].result.sensitivity().available  # re-attached
        assert sorted(os.listdir(tmp_path)) == [FILENAME]  # no temporary file left behind

    def test_finished_run_resumes_without_solving(self, cell, tmp_path):
        """Resuming a finished run redoes no trial and gives the same schedule."""
        spec, agents, ref = cell
        run_fleet(spec, agents, checkpoint_dir=tmp_path)
        calls = []
        res = run_fleet(spec, agents, checkpoint_dir=tmp_path, resume=True, progress=calls.append)
        assert calls == []
        assert _rel(res.coordination.P, ref.coordination.P) <= 1e-12

    @pytest.mark.parametrize("sig", [signal.SIGINT, signal.SIGTERM])
    def test_signal_to_the_command_line(self, depot_reference, tmp_path, sig):
        """``negotiate run`` stopped by a signal mid-run exits 130; ``negotiate run --resume DIR`` then
        writes the uninterrupted schedule (charging depot: 60 rounds, so the signal lands mid-run)."""
        fleet, ref_dir = depot_reference
        out = tmp_path / "run"
        proc = subprocess.Popen(
            [sys.executable, "-m", "negotiate.cli", "run", str(fleet), "--out", str(out), "--quiet"],
            cwd=ROOT, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE, text=True,
        )  # fmt: skip
        ckpt = out / FILENAME
        deadline = time.monotonic() + 60
        while time.monotonic() < deadline and proc.poll() is None:
            if ckpt.exists() and json.loads(ckpt.read_bytes().split(b"\n")[1])["round"] >= 5:
                break
            time.sleep(0.01)
        proc.send_signal(sig)
        _, err = proc.communicate(timeout=60)
        assert proc.returncode == 130, err
        assert "resume" in err and "Traceback" not in err
        assert not (out / "schedule.csv").exists()
        assert main(["run", "--resume", str(out), "--quiet"]) in (0, 3)
        assert (out / "schedule.csv").read_text() == (ref_dir / "schedule.csv").read_text()


class TestBadCheckpoints:
    @pytest.fixture()
    def saved(self, cell, tmp_path):
        spec, agents, _ = cell
        with pytest.raises(Interrupt):
            run_fleet(spec, agents, checkpoint_dir=tmp_path, progress=_stop_after(3))
        return spec, tmp_path / FILENAME

    def test_missing(self, cell, tmp_path):
        """No checkpoint in the folder."""
        with pytest.raises(CheckpointError, match="no checkpoint to resume from"):
            run_fleet(cell[0], cell[1], checkpoint_dir=tmp_path, resume=True)

    def test_truncated(self, saved):
        """A checkpoint cut short fails its length and checksum check before anything is unpickled."""
        spec, path = saved
        path.write_bytes(path.read_bytes()[:-100])
        with pytest.raises(CheckpointError, match="a truncated or damaged checkpoint"):
            read_checkpoint(path.parent)

    def test_altered(self, saved):
        """One flipped byte in the payload fails the checksum."""
        spec, path = saved
        data = bytearray(path.read_bytes())
        data[-10] ^= 0xFF
        path.write_bytes(bytes(data))
        with pytest.raises(CheckpointError, match="do not match"):
            read_checkpoint(path.parent)

    def test_not_a_checkpoint(self, tmp_path):
        """Any other file is refused by its first line."""
        (tmp_path / FILENAME).write_text("[fleet]\nname = 'x'\n")
        with pytest.raises(CheckpointError, match="expected a negotiate checkpoint"):
            read_checkpoint(tmp_path)

    def test_other_version(self, saved):
        """Another format version is refused, naming both versions."""
        _, path = saved
        magic, header, payload = path.read_bytes().split(b"\n", 2)
        h = json.loads(header)
        h["version"] = 99
        path.write_bytes(magic + b"\n" + json.dumps(h).encode() + b"\n" + payload)
        with pytest.raises(CheckpointError, match="expected checkpoint format version 1, found version 99"):
            read_checkpoint(path.parent)

    def test_foreign(self, saved):
        """A checkpoint of another fleet (or another method) is refused."""
        spec, path = saved
        other = replace(spec, coordinator=replace(spec.coordinator, max_rounds=7))
        with pytest.raises(CheckpointError, match="found one of another"):
            run_fleet(other, checkpoint_dir=path.parent, resume=True)
        with pytest.raises(CheckpointError, match="found one of another"):
            read_checkpoint(path.parent, fleet_digest(spec, "gradient"))

    def test_cli_prints_without_traceback(self, saved, capsys):
        """The command line prints the checkpoint error and exits 2."""
        _, path = saved
        path.write_bytes(path.read_bytes()[:200])
        assert main(["run", "--resume", str(path.parent), "--quiet"]) == 2
        err = capsys.readouterr().err
        assert err.startswith("negotiate run: ") and "damaged" in err and "Traceback" not in err

    def test_cli_refuses_a_foreign_checkpoint_before_building(self, saved, tmp_path, capsys):
        """negotiate run OTHER.toml --resume DIR: exit 2 with the reason, before any agent is built (the
        'fleet ...: N agents' line comes after building)."""
        spec, path = saved
        text = (EXAMPLES / "machining_cell.toml").read_text()
        other = tmp_path / "other.toml"
        other.write_text(text.replace("max_rounds = ", "max_rounds = 1", 1))
        assert other.read_text() != text
        assert main(["run", str(other), "--resume", str(path.parent), "--quiet"]) == 2
        out, err = capsys.readouterr()
        assert "found one of another" in err and "agents" not in out
        # the file the checkpoint was made from is accepted and the run continues
        assert main(["run", str(EXAMPLES / "machining_cell.toml"), "--resume", str(path.parent), "--quiet"]) in (0, 3)

    def test_cli_needs_a_fleet_or_resume(self, capsys):
        """``negotiate run`` without a fleet or --resume says what it needs."""
        assert main(["run", "--quiet"]) == 2
        assert "give a fleet file, or --resume DIR" in capsys.readouterr().err
