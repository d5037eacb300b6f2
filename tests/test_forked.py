"""The misclosures computed in a forked child beside the adjustment (``server/forked.py``):
the same result as the plain order, to the byte, and the same errors."""

from __future__ import annotations

import os
from pathlib import Path

import pytest

from server.errors import NetworkError
from server.forked import Pending
from server.pipeline import adjust_fieldbook
from server.results.json_writer import json_bytes

ROOT = Path(__file__).resolve().parents[1]

pytestmark = pytest.mark.skipif(not hasattr(os, "fork"), reason="no fork on this platform")


@pytest.fixture
def alone():
    """The child path needs a process with no other thread (an earlier test may leave one)."""
    import threading

    if threading.active_count() > 1:
        pytest.skip("another thread runs in this test process: nothing would be forked")


@pytest.mark.parametrize(
    "name",
    ["leveling_clean", "leveling_blunder", "closed_traverse", "control_network"],
)
def test_forked_misclosures_give_the_same_result_to_the_byte(name):
    text = (ROOT / "demo_projects" / f"{name}.fieldbook").read_bytes()
    plain = adjust_fieldbook(text)
    forked = adjust_fieldbook(text, forked=True)
    assert forked.misclosures  # each of these books has loops, runs or traverses
    assert json_bytes(forked.to_json_dict()) == json_bytes(plain.to_json_dict())


def test_an_answer_comes_from_the_child(alone):
    parent = os.getpid()
    pending = Pending(lambda: (os.getpid(), 0.1 + 0.2))
    pid, value = pending.result()
    assert pid != parent and value == 0.1 + 0.2


def test_a_failing_child_leaves_the_error_to_the_parent():
    calls = []

    def compute():
        calls.append(os.getpid())
        raise ValueError("loop 7 cannot be closed")

    pending = Pending(compute)
    with pytest.raises(ValueError, match="loop 7"):
        pending.result()
    assert calls == [os.getpid()]  # raised here, by the same code: the child's never counted


def test_a_child_no_longer_wanted_is_stopped_and_reaped(alone):
    import time

    pending = Pending(lambda: time.sleep(60))
    child = pending._child
    assert child is not None
    pending.close()
    with pytest.raises(ChildProcessError):  # reaped: no zombie left behind
        os.waitpid(child, os.WNOHANG)


def test_a_network_error_with_forked_misclosures_is_the_plain_one():
    # a mark no section ties to the control: the engine's error, as without the child
    text = (ROOT / "demo_projects" / "leveling_clean.fieldbook").read_text()
    text += "level LONE-1 LONE-2 0.5000 len=0.2km\n"
    with pytest.raises(NetworkError) as plain:
        adjust_fieldbook(text.encode())
    with pytest.raises(NetworkError) as forked:
        adjust_fieldbook(text.encode(), forked=True)
    assert str(forked.value) == str(plain.value)


def test_with_other_threads_running_nothing_is_forked():
    import threading

    stop = threading.Event()
    worker = threading.Thread(target=stop.wait)
    worker.start()
    try:
        pending = Pending(os.getpid)
        assert pending._child is None and pending.result() == os.getpid()
    finally:
        stop.set()
        worker.join()
