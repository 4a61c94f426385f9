"""The worker side of the remote executors: what runs in a worker process or a Dask worker.

A request carries an agent's fleet record (resources, :class:`~negotiate.fleet.spec.AgentSpec`, solver options,
pickled once) and its warm-start data; the worker builds the agent's NLP the first time it meets that record and
keeps it in a per-process cache keyed by a digest of the record, so each agent is built once per worker, never
per round. The functions are at module level so that they pickle by reference.

Local worker processes end with their coordinator, however it ends (:func:`worker_init`).
"""

from __future__ import annotations

import contextlib
import os
import pickle
import signal
import sys
import threading
from typing import Any

import numpy as np

from negotiate.core.nlp import LocalResult, ParametricNLP
from negotiate.execution.base import AgentOutcome, evaluate_agent
from negotiate.fleet.spec import FleetSpec

__all__ = ["cached_agents", "prepare", "serve_batch", "serve_packed", "worker_init"]

_CACHE: dict[str, tuple[ParametricNLP, threading.Lock]] = {}
_CACHE_LOCK = threading.Lock()


def _build_from_record(blob: bytes) -> ParametricNLP:
    """Build one agent from its pickled (resources, AgentSpec, solver options) record, as build_agents does."""
    from negotiate.fleet.build import build_report

    resources, agent, solver_options = pickle.loads(blob)
    built, problems = build_report(FleetSpec(f"worker:{agent.name}", resources, (agent,)), solver_options)
    if problems or built[0].model is None:
        raise RuntimeError("; ".join(str(p) for p in problems) or f"agent {agent.name!r} could not be built")
    return built[0].model.problem


def worker_init(kernel_watch: bool) -> None:
    """Start of a local worker process: Ctrl-C is left to the coordinator (an interrupt inside IPOPT ends the
    solve as failed), and the worker ends with the coordinator."""
    signal.signal(signal.SIGINT, signal.SIG_IGN)
    _die_with_parent(kernel_watch)


def _die_with_parent(kernel_watch: bool) -> None:
    """End this process as soon as its parent process ends, however it ends (killed outright, or exiting at
    once on a second interrupt): an orphaned worker would otherwise wait for requests forever.

    Everywhere: a daemon thread waits on multiprocessing's sentinel of the parent (a pipe the parent holds
    open, readable once it is gone) and exits. On Linux, with ``kernel_watch``, the kernel also sends SIGKILL
    when the parent ends (``prctl(PR_SET_PDEATHSIG)``), which reaches a worker busy in compiled code that does
    not let the thread run. The kernel's signal follows the *thread* that started the process, so it is asked
    for only by processes started from the parent's main thread.
    """
    import multiprocessing
    from multiprocessing.connection import wait

    parent = multiprocessing.parent_process()
    if parent is None:  # not started by multiprocessing
        return
    if kernel_watch and sys.platform.startswith("linux"):
        import ctypes

        with contextlib.suppress(OSError, AttributeError):
            ctypes.CDLL(None, use_errno=True).prctl(1, signal.SIGKILL)  # 1: PR_SET_PDEATHSIG
        if os.getppid() != parent.pid:  # the parent ended before the request took effect
            os._exit(1)

    def watch() -> None:
        wait([parent.sentinel])
        os._exit(1)

    threading.Thread(target=watch, name="negotiate-parent-watch", daemon=True).start()


def _cached(digest: str, blob: bytes) -> tuple[ParametricNLP, threading.Lock]:
    with _CACHE_LOCK:
        entry = _CACHE.get(digest)
    if entry is None:
        entry = (_build_from_record(blob), threading.Lock())
        with _CACHE_LOCK:
            entry = _CACHE.setdefault(digest, entry)
    return entry


def _serve(
    digest: str, blob: bytes, p: np.ndarray, warm: LocalResult | None, use_guard: bool, want_hessian: bool
) -> tuple[AgentOutcome, int]:
    """One request in a worker: the cached agent's answer and the worker's process id."""
    problem, lock = _cached(digest, blob)
    with lock:  # a ParametricNLP is not thread-safe; Dask workers may run several threads
        out = evaluate_agent(problem, p, warm, use_guard=use_guard, want_hessian=want_hessian)
    return out, os.getpid()


def serve_batch(requests: list[tuple[Any, ...]]) -> list[tuple[AgentOutcome, int]]:
    """Several requests in a worker, answered in order."""
    return [_serve(*r) for r in requests]


def serve_packed(blob: bytes) -> bytes:
    """:func:`serve_batch` on a pickled batch, answered pickled: one frame each way. (Dask would otherwise
    send every NumPy array of every request and answer as a frame of its own, which at a hundred agents per
    task costs more than the solves.)"""
    return pickle.dumps(serve_batch(pickle.loads(blob)), protocol=pickle.HIGHEST_PROTOCOL)


def prepare(digest: str, blob: bytes) -> int:
    """Build (or find) one agent in this worker's cache, with its warm-start solver; the worker's process id."""
    _cached(digest, blob)[0].warm_solver()
    return os.getpid()


def cached_agents() -> int:
    """Number of agents built in this process by the requests of remote executors (for tests and diagnostics)."""
    with _CACHE_LOCK:
        return len(_CACHE)
