"""The one place findings are worded: records, messages, and what a policy does with them.

The numbers in the messages are worked by hand from the inputs (common practice: the box
excess is the distance beyond min/max in range widths; time ratios are t / horizon).
"""

from __future__ import annotations

import json
import math
import warnings

import numpy as np
import pytest

from stridecast.runtime import ExtrapolationError, ExtrapolationWarning, Finding
from stridecast.runtime.envelope import Assessment
from stridecast.runtime.findings import envelope_findings, horizon_findings, warn_or_raise

NAMES = ("a", "b", "c", "d", "e")
UNITS = ("m", "", "m/s", "", "")


def assessment(batch: int, **changes) -> Assessment:
    fields = dict(box_excess=np.zeros((batch, 5)), box_time=np.full(batch, np.inf),
                  distance_ratio=np.full(batch, 0.5), far_time=np.full(batch, np.inf),
                  worst_offset=np.zeros((batch, 5)), checked=batch, visited=batch)
    fields.update(changes)
    return Assessment(**fields)


def word(result: Assessment, *, path: bool = True, radius: float | None = 0.2):
    return envelope_findings(result, names=NAMES, units=UNITS, lower=[-1.0] * 5,
                             upper=[1.0] * 5, radius=radius, visit_times=path, unit="s")


def test_box_message_names_components_worst_first_and_limits_the_list():
    excess = np.zeros((3, 5))
    excess[0] = [0.1, 0.0, 0.3, 0.05, 0.2]
    excess[2] = [0.0, 0.4, 0.0, 0.0, 0.0]
    (finding,) = word(assessment(3, box_excess=excess, box_time=np.array([2.5, np.inf, 1.25])),
                      radius=None)  # no samples: the plain min/max box
    assert finding.kind == "outside_box" and finding.states == (0, 2)
    assert finding.components == ("b", "c", "e", "a", "d")
    assert finding.t == 1.25 and finding.amount == pytest.approx(0.4)
    assert finding.message == (
        "2 of 3 states leave the training range (the min/max of the training data), first at "
        "t = 1.25 s: b by up to 0.4 range widths beyond [-1, 1]; c by up to 0.3 range widths "
        "beyond [-1, 1] m/s; e by up to 0.2 range widths beyond [-1, 1]; and 2 more "
        "components.")


def test_far_message_names_the_components_of_most_of_the_distance():
    offset = np.zeros((1, 5))
    offset[0] = [0.0, 3.0, 0.0, 4.0, 0.5]  # squares 9 and 16 of 25.25: d then b make 80 %
    (finding,) = word(assessment(1, distance_ratio=np.array([2.5]), far_time=np.array([0.0]),
                                 worst_offset=offset))
    assert finding.kind == "far_from_data" and finding.components == ("d", "b")
    assert finding.amount == 2.5 and finding.t == 0.0
    assert finding.message == (
        "The state is far from the training data from the start (t = 0): the nearest training "
        "state is 2.5× the radius away (0.5 vs 0.2 in normalised units), mostly in d, b.")
    (initial,) = word(assessment(1, distance_ratio=np.array([2.5]), far_time=np.array([0.0]),
                                 worst_offset=offset, checked=1, visited=4), path=False)
    assert initial.t is None and "training data: the nearest" in initial.message
    assert "(1 of 4 visited states measured)" in initial.message


def test_nothing_to_say():
    assert word(assessment(4)) == ()
    assert horizon_findings(np.array([0.5, 1.0]), horizon=1.0, errors=np.full(2, np.nan),
                            tolerance=None, unit="s") == ()


def test_horizon_messages():
    (finding,) = horizon_findings(np.array([3.0]), horizon=2.0, errors=np.array([np.nan]),
                                  tolerance=None, unit="h")
    assert finding.message == "t = 3 h is beyond the validated horizon of 2 h (1.5×)."
    assert (finding.t, finding.amount) == (3.0, 1.5)
    (finding,) = horizon_findings(np.array([0.0, 2.0, 3.0]), horizon=0.0,
                                  errors=np.array([0.0, 0.4, np.inf]), tolerance=0.1, unit="s")
    assert finding.message == (
        "2 of 3 requested times (from 2 s to 3 s) are beyond the validated horizon of 0 s "
        "(any time past 0); held-out forecasts there diverged or were not measured, so the "
        "expected error is unbounded (tolerance 0.1).")
    assert math.isinf(finding.amount) and finding.to_dict()["amount"] is None
    (finding,) = horizon_findings(np.array([1.0]), horizon=None, errors=np.array([np.nan]),
                                  tolerance=None, unit="s")
    assert finding.kind == "no_validation" and "no validated horizon" in finding.message


def test_to_dict_is_json_ready():
    finding = Finding(kind="outside_box", message="m.", states=(1, 3), components=("a",),
                      t=2.0, amount=0.25)
    assert json.loads(json.dumps(finding.to_dict(), allow_nan=False)) == {
        "kind": "outside_box", "message": "m.", "states": [1, 3], "components": ["a"],
        "t": 2.0, "amount": 0.25}


def test_policies():
    box = Finding(kind="outside_box", message="Box.")
    horizon = Finding(kind="beyond_horizon", message="Late.")
    note = Finding(kind="no_validation", message="Unvalidated.")
    with pytest.warns(ExtrapolationWarning, match=r"^Box\. Late\.$"):
        warn_or_raise([box, note, horizon], "warn")
    with pytest.raises(ExtrapolationError, match=r"^Box\. \(on_extrapolation='error'\)$"):
        warn_or_raise([box, note], "error")
    with warnings.catch_warnings(record=True) as record:
        warnings.simplefilter("always")
        warn_or_raise([box, horizon], "ignore")
        warn_or_raise([note], "warn")  # "no_validation" is reported, never warned about
    assert record == []
