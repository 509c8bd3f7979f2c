"""Running model computations off the event loop, bounded in number, queue and time.

A `Gate` admits at most `max_running + max_waiting` requests (503 beyond that), runs at
most `max_running` computations at once in worker threads, and answers 504 once a request's
budget has passed. Requests are admitted before their bodies are read, so memory held by
uploads is bounded by the admitted requests times the body limit, not by open connections.
The runtime has no cancellation hook, so a computation that outlives its budget
finishes in its thread (its result is discarded) and keeps its slot until then: the CPU bound
holds even when clients give up.
"""

from __future__ import annotations

from collections.abc import AsyncIterator, Callable
from contextlib import asynccontextmanager
from dataclasses import dataclass, field
from typing import Any

import anyio
from anyio.abc import TaskGroup

from .errors import ApiError


@dataclass
class _Job:
    """One computation handed from a request to the gate's task group."""

    function: Callable[[], Any]
    done: anyio.Event = field(default_factory=anyio.Event)
    abandoned: bool = False
    result: Any = None
    error: BaseException | None = None


@dataclass
class Ticket:
    """An admitted request's place in the gate; handed to `Gate.run` with its computation."""

    handed_over: bool = False


class Gate:
    """Admission, concurrency and time limits for model computations.

    Parameters
    ----------
    task_group : anyio.abc.TaskGroup
        Lives as long as the app (opened by its lifespan); computations run in its tasks so
        that one can outlive the request that gave up on it.
    max_running : int
        Computations running at once (worker threads).
    max_waiting : int
        Admitted computations allowed to wait for a running slot.
    """

    def __init__(self, task_group: TaskGroup, *, max_running: int, max_waiting: int):
        self._task_group = task_group
        self._max_running = max_running
        self._max_waiting = max_waiting
        self._slots = anyio.Semaphore(max_running)
        self._threads = anyio.CapacityLimiter(max_running)
        self._admitted = 0

    @property
    def admitted(self) -> int:
        """Computations waiting or running (including ones whose request timed out)."""
        return self._admitted

    @asynccontextmanager
    async def admit(self) -> AsyncIterator[Ticket]:
        """Hold a place for one request (503 when full) until its computation is handed over.

        Use around reading the body and validating it; pass the ticket to `run`. A request that
        fails before `run` gives its place back on leaving the block.
        """
        self._check_room()
        self._admitted += 1
        ticket = Ticket()
        try:
            yield ticket
        finally:
            if not ticket.handed_over:
                self._admitted -= 1

    def _check_room(self) -> None:
        if self._admitted >= self._max_running + self._max_waiting:
            raise ApiError(503, f"the service is busy: {self._max_running} computations are "
                                f"running and {self._max_waiting} waiting; try again shortly.",
                           code="overloaded", headers={"Retry-After": "1"})

    async def run(self, function: Callable[[], Any], *, started: float, budget: float,
                  ticket: Ticket | None = None) -> Any:
        """Run `function()` in a worker thread and return its result (or raise its error).

        Parameters
        ----------
        function : callable
            The computation; must not touch the event loop.
        started : float
            When the request started, in `anyio.current_time()` seconds.
        budget : float
            Seconds the request may take in total, queueing included.
        ticket : Ticket, optional
            The place `admit` gave this request; without one, the request is admitted here.

        Raises
        ------
        ApiError
            503 when too many computations are waiting, 504 when the budget runs out.
        """
        if ticket is None:
            self._check_room()
            self._admitted += 1
        else:
            ticket.handed_over = True  # from here `_execute` gives the place back
        job = _Job(function)
        self._task_group.start_soon(self._execute, job)
        remaining = budget - (anyio.current_time() - started)
        try:
            with anyio.move_on_after(max(remaining, 0.0)):
                await job.done.wait()
        finally:
            # Also when the request itself is cancelled (client gone, shutdown).
            job.abandoned = not job.done.is_set()
        elapsed = anyio.current_time() - started
        # The elapsed check also covers a computation that finished right at the deadline.
        if not job.done.is_set() or elapsed > budget:
            job.abandoned = True
            raise ApiError(504, f"the request took longer than its budget of {budget:g} s "
                                f"(gave up after {elapsed:.3g} s).")
        if job.error is not None:
            raise job.error
        return job.result

    async def _execute(self, job: _Job) -> None:
        try:
            async with self._slots:
                if job.abandoned:  # the request gave up while queued: skip the work
                    return
                try:
                    job.result = await anyio.to_thread.run_sync(job.function,
                                                                limiter=self._threads)
                except Exception as error:  # handed to the waiting request, which re-raises
                    job.error = error
        finally:
            self._admitted -= 1
            job.done.set()
