"""``negotiate.run.run_fleet`` does all that ``negotiate run`` does, from Python: the run folder, the executor
(worker processes), the time limit, resume, the outputs, the timing and a graceful stop on a signal.

The reference for every schedule here is the plain in-process ``run_fleet(spec)``: IPOPT solving each agent
in this process, as the rest of the suite checks against SciPy, CasADi and the examples' closed forms.
"""

from __future__ import annotations

import os
import signal
import tomllib
from dataclasses import replace
from pathlib import Path

import numpy as np
import pytest
from fleets import ONE_TRACTOR

from negotiate.errors import CheckpointError, FleetError, RunFolderError
from negotiate.fleet.build import build_agents
from negotiate.fleet.parse import load_fleet, parse_fleet
from negotiate.output.checkpoint import FILENAME
from negotiate.run import LOCK_FILE, claim_run_folder, run_fleet, write_outputs

EXAMPLES = Path(__file__).resolve().parent.parent / "examples"


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
def cell(tmp_path_factory):
    """The shipped machining cell (invented data) with first-come-first-served orders, its plain in-process
    run, and that run's schedule.csv as written by :func:`write_outputs`."""
    spec = load_fleet(EXAMPLES / "machining_cell.toml")
    spec = replace(spec, coordinator=replace(spec.coordinator, order="fcfs"))
    ref = run_fleet(spec)
    folder = tmp_path_factory.mktemp("cell-reference")
    write_outputs(ref, folder)
    return spec, ref, (folder / "schedule.csv").read_bytes()


@pytest.fixture(scope="module")
def tractor():
    """One tractor charging from a grid connection (tests/fleets.py, invented numbers)."""
    return parse_fleet(tomllib.loads(ONE_TRACTOR), "tractor.toml")


class TestExecutorChoice:
    def test_two_workers_give_the_in_process_schedule(self, cell, tmp_path):
        """``workers=2`` with ``out``: the agents are solved in two worker processes, and the schedule, rounds,
        solve count and schedule.csv are those of the in-process run (same IPOPT solves from the same
        starts; 1e-9 relative allows only the last digits of a transfer between processes)."""
        spec, ref, schedule = cell
        res = run_fleet(spec, workers=2, out=tmp_path / "run")
        assert _rel(res.coordination.P, ref.coordination.P) <= 1e-9
        assert (res.coordination.rounds, res.coordination.agent_solves) == (
            ref.coordination.rounds,
            ref.coordination.agent_solves,
        )
        assert (tmp_path / "run" / "schedule.csv").read_bytes() == schedule
        names = {p.relative_to(tmp_path / "run").parts[0] for p in res.files}
        assert {"schedule.csv", "run.json", "report.html", "trajectories"} <= names and FILENAME not in names
        assert sorted(n for n in os.listdir(tmp_path / "run") if n.startswith(".")) == []  # lock released

    def test_executor_and_workers_together_are_refused(self, tractor):
        """An executor of one's own and ``workers`` contradict each other: refused before anything runs."""
        with pytest.raises(ValueError, match="either an executor or 'workers'"):
            run_fleet(tractor, executor=lambda *a: [], workers=2)

    @pytest.mark.parametrize("limit", [0.0, -1.0, float("inf"), float("nan")])
    def test_time_limit_must_be_positive(self, tractor, limit):
        """A time limit that is not a positive finite number of seconds is a ValueError naming it."""
        with pytest.raises(ValueError, match=r"'time_limit' must be a positive number of seconds"):
            run_fleet(tractor, time_limit=limit)

    def test_time_limit_in_process_reaches_ipopt(self, tractor, monkeypatch):
        """In process, the limit is IPOPT's own ``max_wall_time``, given to the agents built here."""
        import negotiate.fleet.build

        seen = []
        real = negotiate.fleet.build.build_agents

        def spy(spec, solver_options=None):
            seen.append(solver_options)
            return real(spec, solver_options=solver_options)

        monkeypatch.setattr(negotiate.fleet.build, "build_agents", spy)
        run_fleet(tractor, time_limit=30.0)
        run_fleet(tractor)
        assert seen == [{"ipopt.max_wall_time": 30.0}, None]


class TestRunFolderAndResume:
    def test_resume_through_the_api(self, cell, tmp_path):
        """Stopped after its third round, the run leaves its checkpoint (no outputs, the lock released);
        ``run_fleet(None, out=DIR, resume=True)`` takes the fleet from the checkpoint and writes the
        uninterrupted schedule.csv, byte for byte."""
        spec, ref, schedule = cell
        out = tmp_path / "run"
        with pytest.raises(Interrupt):
            run_fleet(spec, out=out, progress=_stop_after(3))
        assert sorted(os.listdir(out)) == [FILENAME]
        res = run_fleet(None, out=out, resume=True)
        assert _rel(res.coordination.P, ref.coordination.P) <= 1e-12
        assert res.coordination.agent_solves == ref.coordination.agent_solves
        assert (out / "schedule.csv").read_bytes() == schedule
        assert (out / "run.json").is_file() and LOCK_FILE not in os.listdir(out)

    def test_resume_needs_a_checkpoint(self, tractor, tmp_path):
        """Resuming from a folder without a checkpoint, or without any folder, is refused."""
        (tmp_path / "empty").mkdir()
        with pytest.raises(CheckpointError, match="no checkpoint to resume from"):
            run_fleet(tractor, out=tmp_path / "empty", resume=True)
        with pytest.raises(ValueError, match="'resume' needs the run folder"):
            run_fleet(tractor, resume=True)
        with pytest.raises(ValueError, match="give the fleet"):
            run_fleet(None, out=tmp_path / "fresh")

    def test_folder_in_use_is_refused(self, tractor, tmp_path):
        """A folder claimed by another run is refused with RunFolderError before anything is built."""
        with claim_run_folder(tmp_path / "run"):
            with pytest.raises(RunFolderError, match="is in use by another run"):
                run_fleet(tractor, out=tmp_path / "run")

    def test_outputs_that_cannot_be_written(self, tractor, tmp_path, monkeypatch):
        """A full disk while writing the outputs is a RunFolderError saying the finished run is kept in its
        checkpoint and how to write the outputs from it."""
        import negotiate.run

        def full(run, out):
            raise OSError(28, "No space left on device", str(Path(out) / "schedule.csv"))

        monkeypatch.setattr(negotiate.run, "write_outputs", full)
        out = tmp_path / "run"
        with pytest.raises(RunFolderError) as err:
            run_fleet(tractor, out=out)
        assert str(err.value) == (
            f"cannot write the outputs into {out} (No space left on device: {out / 'schedule.csv'}); the finished "
            f"run is kept in {out / FILENAME}: fix the folder, then write them with 'negotiate run --resume {out}'"
        )
        assert sorted(os.listdir(out)) == [FILENAME]

    def test_unknown_option_refused_before_building(self, tractor, monkeypatch):
        """Method options the method does not declare are a FleetError before any agent is built."""
        import negotiate.fleet.build

        def never(*a, **k):
            raise AssertionError("built")

        monkeypatch.setattr(negotiate.fleet.build, "build_agents", never)
        spec = replace(tractor, coordinator=replace(tractor.coordinator, options={"first_stepp": 1}))
        with pytest.raises(FleetError, match="first_stepp"):
            run_fleet(spec)


class TestHooks:
    def test_on_built_and_phases(self, tractor):
        """``on_built`` is called once with the fleet, its built agents and the settings in force, before the
        first round; the phases add up to the wall time and the build phase includes the caller's
        ``build_time``."""
        events = []

        def built(spec, agents, settings):
            events.append(("built", spec.name, len(agents), settings.method))

        user = f"{EXAMPLES / 'custom_method.py'}:ShrinkingStep"  # imported and registered by run_fleet
        res = run_fleet(tractor, method=user, on_built=built, progress=lambda r: events.append("round"), build_time=5.0)
        assert events[0] == ("built", tractor.name, 1, "shrinking-step") and events.count(events[0]) == 1
        assert events[1:] == ["round"] * (len(events) - 1) and len(events) > 1
        assert res.phase_times["build"] >= 5.0
        assert res.wall_time == pytest.approx(sum(res.phase_times.values()), rel=1e-12)

    def test_stop_on_signal(self, cell, tmp_path, capfd):
        """With ``stop_on_signal``, SIGINT during the first round is acted on after it: KeyboardInterrupt at
        the next round, with that round in the checkpoint; the handlers are put back afterwards, and the
        resumed run ends at the uninterrupted schedule."""
        spec, ref, schedule = cell
        before = signal.getsignal(signal.SIGINT)
        rounds = []

        def progress(rec):
            rounds.append(rec.round)
            os.kill(os.getpid(), signal.SIGINT)

        with pytest.raises(KeyboardInterrupt):
            run_fleet(spec, out=tmp_path / "run", progress=progress, stop_on_signal=True)
        assert len(rounds) == 1
        assert signal.getsignal(signal.SIGINT) is before
        assert "stopping after the round in progress; a second signal stops at once" in capfd.readouterr().err
        assert sorted(os.listdir(tmp_path / "run")) == [FILENAME]
        run_fleet(None, out=tmp_path / "run", resume=True)
        assert (tmp_path / "run" / "schedule.csv").read_bytes() == schedule


def test_agents_built_by_the_caller_still_work(tractor):
    """The call of before (spec and built agents, nothing else) gives the schedule of a call that builds."""
    a = run_fleet(tractor, build_agents(tractor))
    b = run_fleet(tractor)
    assert _rel(a.coordination.P, b.coordination.P) <= 1e-12
    assert a.files == () and b.files == ()
