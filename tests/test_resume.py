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
from fleets import TWO_TRUCKS

from negotiate.cli import main
from negotiate.errors import CheckpointError
from negotiate.fleet.build import build_agents
from negotiate.fleet.parse import load_fleet
from negotiate.output.checkpoint import FILENAME, FORMAT_VERSION, fleet_digest, read_checkpoint
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

    def test_order_master_resumes_exactly(self, cell, tmp_path):
        """With order = "master" (cuts from every finished coordination's final evaluation), a run stopped in
        its third coordination and resumed proposes the same orders and ends at the same schedule."""
        spec, agents, _ = cell
        spec = replace(spec, coordinator=replace(spec.coordinator, order="master"))
        ref = run_fleet(spec, agents)
        assert len(ref.order_trials) >= 3
        trials = []

        def progress(rec):
            if rec.trial == 2:
                raise Interrupt
            trials.append(rec.trial)

        with pytest.raises(Interrupt):
            run_fleet(spec, build_agents(spec), checkpoint_dir=tmp_path, progress=progress)
        assert max(trials) == 1  # two coordinations finished, the third started
        res = run_fleet(spec, build_agents(spec), checkpoint_dir=tmp_path, resume=True)
        assert [t.orders for t in res.order_trials] == [t.orders for t in ref.order_trials]
        assert _rel(res.coordination.P, ref.coordination.P) <= 1e-12

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
        deadline = time.monotonic() + 300  # a generous bound for a loaded machine, never reached when well
        while time.monotonic() < deadline and proc.poll() is None:
            if ckpt.exists() and json.loads(ckpt.read_bytes().split(b"\n")[1])["round"] >= 5:
                break
            time.sleep(0.01)  # polling the checkpoint, not waiting for time to pass
        assert proc.poll() is None, "the run ended before its fifth round could be interrupted"
        proc.send_signal(sig)
        _, err = proc.communicate(timeout=300)
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
        expected = f"expected checkpoint format version {FORMAT_VERSION}, found version 99"
        with pytest.raises(CheckpointError, match=expected):
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


# ---------------------------------------------------------------------------------------------------------
# a checkpoint is data only: reading one never runs code, and it keeps every number exactly


class _RunsCode:
    """Unpickling this runs a command that leaves a marker file (what a hostile checkpoint would do)."""

    def __init__(self, marker: Path) -> None:
        self.marker = marker

    def __reduce__(self):
        return (os.system, (f"touch '{self.marker}'",))


def _forge(folder: Path, spec, payload: bytes, version: int, **extra) -> Path:
    """A checkpoint file with a valid header (the digest of the fleet, the payload's length and checksum)."""
    import hashlib

    from negotiate.output.checkpoint import MAGIC

    header = {"version": version, "fleet": spec.name, "digest": fleet_digest(spec, spec.coordinator.method),
              "payload_bytes": len(payload), "payload_sha256": hashlib.sha256(payload).hexdigest(), "trial": 0,
              "round": 0, **extra}  # fmt: skip
    folder.mkdir(parents=True, exist_ok=True)
    path = folder / FILENAME
    path.write_bytes(MAGIC + json.dumps(header).encode() + b"\n" + payload)
    return path


def _same(a, b, where="state"):
    """Exact equality of two states: same types everywhere, arrays equal bit for bit (dtype, shape, memory
    order), floats equal (nan to nan), records field by field (the CasADi problem aside)."""
    import dataclasses

    from negotiate.coordination.methods import Method

    assert type(a) is type(b), f"{where}: {type(a)} != {type(b)}"
    if isinstance(a, np.ndarray):
        assert a.dtype == b.dtype and a.shape == b.shape, where
        assert a.flags.c_contiguous == b.flags.c_contiguous and a.flags.f_contiguous == b.flags.f_contiguous, where
        assert a.tobytes(order="A") == b.tobytes(order="A"), where
    elif isinstance(a, float | np.floating):
        assert a == b or (a != a and b != b), f"{where}: {a!r} != {b!r}"
        assert np.signbit(a) == np.signbit(b), where
    elif isinstance(a, list | tuple):
        assert len(a) == len(b), where
        for i, (x, y) in enumerate(zip(a, b, strict=True)):
            _same(x, y, f"{where}[{i}]")
    elif isinstance(a, dict):
        assert list(a) == list(b), where
        for k in a:
            _same(a[k], b[k], f"{where}[{k!r}]")
    elif dataclasses.is_dataclass(a):
        for f in dataclasses.fields(a):
            if f.name != "_problem":
                _same(getattr(a, f.name), getattr(b, f.name), f"{where}.{f.name}")
        if hasattr(a, "scale"):
            _same(a.scale, b.scale, f"{where}.scale")
    elif isinstance(a, Method):
        _same(vars(a), vars(b), f"{where}.<{type(a).__name__}>")
    else:
        assert a == b, f"{where}: {a!r} != {b!r}"


class TestCheckpointIsData:
    def test_forged_pickle_checkpoint_never_runs(self, cell, tmp_path, capsys):
        """A pickle that would run a command, in a checkpoint of the old pickle format with a valid digest and
        checksum, or as the state or the array archive of the current format, or as the bare file: refused
        with CheckpointError (exit 2 from the command line), and the command never runs."""
        spec = cell[0]
        marker = tmp_path / "ran"
        evil = __import__("pickle").dumps(_RunsCode(marker))
        old = _forge(tmp_path / "old", spec, evil, 1)
        with pytest.raises(CheckpointError, match="found version 1 .a pickle, which is never loaded"):
            read_checkpoint(old.parent)
        assert main(["run", "--resume", str(old.parent), "--quiet"]) == 2
        assert "found version 1" in capsys.readouterr().err
        as_state = _forge(tmp_path / "state", spec, evil, FORMAT_VERSION, state_bytes=len(evil))
        as_archive = _forge(tmp_path / "archive", spec, b'{"tree":null,"arrays":["|O"]}' + evil, FORMAT_VERSION,
                            state_bytes=29)  # fmt: skip
        bare = tmp_path / "bare" / FILENAME
        bare.parent.mkdir()
        bare.write_bytes(evil)
        for path in (as_state, as_archive, bare):
            with pytest.raises(CheckpointError):
                read_checkpoint(path.parent)
            assert main(["run", "--resume", str(path.parent), "--quiet"]) == 2
        assert not marker.exists()

    def test_object_arrays_are_refused(self, cell, tmp_path, monkeypatch):
        """An archive holding an object array (which numpy would unpickle) is refused: numpy.load is called
        with allow_pickle=False, for every checkpoint read."""
        import io

        spec = cell[0]
        marker = tmp_path / "ran"
        buf = io.BytesIO()
        np.savez(buf, a0=np.array([_RunsCode(marker)], dtype=object))
        state = b'{"tree":null,"arrays":["<f8"]}'
        path = _forge(tmp_path / "run", spec, state + buf.getvalue(), FORMAT_VERSION, state_bytes=len(state))
        calls = []
        real = np.load

        def load(*args, **kwargs):
            calls.append(kwargs)
            return real(*args, **kwargs)

        monkeypatch.setattr(np, "load", load)
        with pytest.raises(CheckpointError, match="allow_pickle=False"):
            read_checkpoint(path.parent)
        assert not marker.exists()
        with pytest.raises(Interrupt):  # a real checkpoint is read the same way
            run_fleet(spec, cell[1], checkpoint_dir=tmp_path / "real", progress=_stop_after(2))
        read_checkpoint(tmp_path / "real")
        assert len(calls) == 2 and all(k.get("allow_pickle") is False for k in calls)

    def test_only_known_records_are_built(self, cell, tmp_path):
        """A checkpoint whose state names a type outside the closed list (with a valid checksum) is refused."""
        from negotiate.output.checkpoint import MAGIC

        spec, agents, _ = cell
        with pytest.raises(Interrupt):
            run_fleet(spec, agents, checkpoint_dir=tmp_path / "run", progress=_stop_after(2))
        data = (tmp_path / "run" / FILENAME).read_bytes()
        header = json.loads(data[len(MAGIC) :].split(b"\n", 1)[0])
        payload = data[len(MAGIC) :].split(b"\n", 1)[1]
        state, archive = payload[: header["state_bytes"]], payload[header["state_bytes"] :]
        state = state.replace(b'"$c":"RunState"', b'"$c":"subprocess.Popen"', 1)
        header.pop("payload_bytes"), header.pop("payload_sha256"), header.pop("version")
        _forge(tmp_path / "forged", spec, state + archive, FORMAT_VERSION, **{**header, "state_bytes": len(state)})
        with pytest.raises(CheckpointError, match="unknown record type 'subprocess.Popen'"):
            read_checkpoint(tmp_path / "forged")

    @pytest.mark.parametrize("fleet, method", [("cell", "bundle"), ("cell", "newton"), ("trucks", "bundle"),
                                               ("trucks", "gradient")])  # fmt: skip
    def test_state_round_trips_exactly(self, cell, fleet, method):
        """Everything a checkpoint holds comes back identical, after the start and after every round: the
        method's state (the bundle's cuts and metric, the line-search state), the evaluations with each
        agent's LocalResult, certificate and guard report, the warm starts, the history, and a finished
        trial's full result."""
        import tomllib

        from negotiate.coordination.engine import coordinate
        from negotiate.fleet.parse import parse_fleet
        from negotiate.output.checkpoint import RunState, TrialRecord, _decode, _encode

        if fleet == "cell":
            spec, agents, _ = cell
        else:
            spec = parse_fleet(tomllib.loads(TWO_TRUCKS))
            agents = build_agents(spec)
        settings = replace(spec.coordinator, method=method, max_rounds=6)
        states = []
        res = coordinate(agents, spec.resources, settings, checkpoint=states.append)
        rec = TrialRecord({k: list(v) for k, v in res.orders.items()}, res.total, np.asarray(res.P), res)
        assert len(states) >= 2  # the start and at least one round
        for st in states:
            state = RunState(spec, method, [rec], (1, res.orders, st))
            back = _decode(*_encode(state))
            _same(state, back)
            m = back.current[2].method
            assert m.incumbent is None or m.incumbent.feasible is m.feasible  # shared objects stay shared
        if fleet == "trucks":
            # a point the guard flags, so that guard reports round-trip too: each truck crosses the bridge in
            # exactly its shortest time (speed limit all through it), where LICQ fails (docs/models.md)
            from negotiate.coordination.engine import Oracle

            feasible = states[0].latest.feasible
            P = np.asarray(states[0].latest.P, dtype=float).copy()
            for i, a in enumerate(agents):
                sl = feasible.layout.slice(i)
                P[sl.start + 1] = P[sl.start] + a.reachable.lower[1] - a.reachable.lower[0]
            flagged = replace(states[0], latest=Oracle(agents, feasible)(P))
            assert any(r.guard is not None for r in flagged.latest.reports)
            back = _decode(*_encode(RunState(spec, method, [rec], (1, res.orders, flagged))))
            _same(RunState(spec, method, [rec], (1, res.orders, flagged)), back)
        if method == "bundle":
            assert sum(len(c) for c in states[-1].method.cuts) > 0

    def test_user_method_from_a_file_resumes_mid_trial(self, tmp_path):
        """A method loaded from a file path is saved mid-trial through its attributes (it could not be
        pickled), and an interrupted run resumes to the uninterrupted schedule."""
        from negotiate.run import resolve_method

        text = (EXAMPLES / "charging_depot.toml").read_text().replace("max_rounds = 60", "max_rounds = 12")
        spec_path = tmp_path / "depot.toml"
        spec_path.write_text(text)
        spec = load_fleet(spec_path)
        name = resolve_method(f"{EXAMPLES / 'custom_method.py'}:ShrinkingStep")
        agents = build_agents(spec)
        ref = run_fleet(spec, agents, method=name)
        with pytest.raises(Interrupt):
            run_fleet(spec, agents, method=name, checkpoint_dir=tmp_path / "run", progress=_stop_after(5))
        saved = read_checkpoint(tmp_path / "run")
        assert saved.current is not None and saved.current[2].rounds == 4
        res = run_fleet(spec, build_agents(spec), method=name, checkpoint_dir=tmp_path / "run", resume=True)
        assert _rel(res.coordination.P, ref.coordination.P) <= 1e-12
        assert [h.trial_total for h in res.coordination.history] == [h.trial_total for h in ref.coordination.history]
