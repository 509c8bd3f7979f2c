"""The gate: computations off the event loop, bounded in number, queue and time."""

from __future__ import annotations

import threading
import time
from functools import partial

import anyio
import pytest

from stridecast.service import ApiError
from stridecast.service.execution import Gate

ADVANCE = "/v1/models/oscillator/advance"


def run_with_gate(scenario, **limits):
    async def main():
        async with anyio.create_task_group() as task_group:
            gate = Gate(task_group, **limits)
            try:
                return await scenario(gate)
            finally:
                task_group.cancel_scope.cancel()

    return anyio.run(main)


def test_runs_in_a_worker_thread_and_returns_the_result():
    async def scenario(gate):
        return await gate.run(threading.get_ident, started=anyio.current_time(), budget=5.0)

    assert run_with_gate(scenario, max_running=1, max_waiting=0) != threading.get_ident()


def test_errors_of_the_computation_reach_the_request():
    def fail():
        raise ZeroDivisionError("boom")

    async def scenario(gate):
        with pytest.raises(ZeroDivisionError, match="boom"):
            await gate.run(fail, started=anyio.current_time(), budget=5.0)
        return gate.admitted

    assert run_with_gate(scenario, max_running=1, max_waiting=0) == 0


def test_budget_exceeded_is_504_at_the_deadline_and_the_slot_is_held_until_the_end():
    release = threading.Event()

    async def scenario(gate):
        started = anyio.current_time()
        with pytest.raises(ApiError, match=r"longer than its budget of 0.05 s") as caught:
            await gate.run(partial(release.wait, 10), started=started, budget=0.05)
        waited = anyio.current_time() - started
        # The computation still runs in its thread and still counts against the limits.
        still_admitted = gate.admitted
        release.set()
        with anyio.fail_after(5):
            while gate.admitted:
                await anyio.sleep(0.01)
        return caught.value.status, waited, still_admitted

    status, waited, still_admitted = run_with_gate(scenario, max_running=1, max_waiting=0)
    assert status == 504
    assert waited < 2.0  # answered at the deadline, not when the thread finished
    assert still_admitted == 1


def test_overload_answers_503_at_once():
    release = threading.Event()

    async def scenario(gate):
        async with anyio.create_task_group() as group:
            group.start_soon(partial(gate.run, partial(release.wait, 10),
                                     started=anyio.current_time(), budget=10.0))
            group.start_soon(partial(gate.run, partial(release.wait, 10),
                                     started=anyio.current_time(), budget=10.0))
            await anyio.sleep(0.05)
            started = time.perf_counter()
            with pytest.raises(ApiError, match=r"busy: 1 computations are running and 1 "
                                               r"waiting") as caught:
                await gate.run(time.time, started=anyio.current_time(), budget=10.0)
            elapsed = time.perf_counter() - started
            release.set()
        return caught.value.status, caught.value.headers, elapsed

    status, headers, elapsed = run_with_gate(scenario, max_running=1, max_waiting=1)
    assert status == 503 and headers == {"Retry-After": "1"}
    assert elapsed < 0.5


def test_queued_computation_abandoned_by_its_request_never_runs():
    release = threading.Event()
    ran = []

    async def scenario(gate):
        async with anyio.create_task_group() as group:
            group.start_soon(partial(gate.run, partial(release.wait, 10),
                                     started=anyio.current_time(), budget=10.0))
            await anyio.sleep(0.02)
            with pytest.raises(ApiError):
                await gate.run(partial(ran.append, 1), started=anyio.current_time(),
                               budget=0.05)
            release.set()
        while gate.admitted:
            await anyio.sleep(0.01)

    run_with_gate(scenario, max_running=1, max_waiting=1)
    assert ran == []


def test_app_answers_503_when_overloaded(make_client):
    client = make_client(max_concurrency=1, max_waiting=0)
    gate = client.app.state.gate
    release = threading.Event()
    busy = client.portal.start_task_soon(partial(gate.run, partial(release.wait, 10),
                                                 started=0.0, budget=1e9))
    try:
        response = client.post(ADVANCE, json={"state": [1, 0], "t": 1})
    finally:
        release.set()
        busy.result(timeout=5)
    assert response.status_code == 503
    assert response.headers["retry-after"] == "1"
    assert response.json()["code"] == "overloaded"
    assert client.post(ADVANCE, json={"state": [1, 0], "t": 1}).status_code == 200


def test_app_answers_504_when_the_budget_runs_out(make_client):
    client = make_client(request_timeout=1e-9)
    response = client.post("/v1/models/oscillator/forecast",
                           json={"state": [1, 0], "times": [0.05 * k for k in range(2000)]})
    assert response.status_code == 504
    assert "longer than its budget of 1e-09 s" in response.json()["error"]


def test_admission_is_held_until_the_computation_is_handed_over():
    # A request admitted before reading its body keeps its place (common practice: bounded
    # admission), gives it back if it fails before computing, and hands it to the computation.
    async def scenario() -> list[object]:
        seen: list[object] = []
        async with anyio.create_task_group() as task_group:
            gate = Gate(task_group, max_running=1, max_waiting=0)
            async with gate.admit():
                seen.append(gate.admitted)
                with pytest.raises(ApiError, match="busy"):
                    async with gate.admit():
                        pass
            seen.append(gate.admitted)
            async with gate.admit() as ticket:
                seen.append(await gate.run(lambda: "done", started=anyio.current_time(),
                                           budget=5.0, ticket=ticket))
            seen.append(gate.admitted)
        return seen

    assert anyio.run(scenario) == [1, 0, "done", 0]
