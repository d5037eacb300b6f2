"""A stored run's parts (result, rows, plot) are made once and kept, within a bound."""

from __future__ import annotations

import re
import warnings
from pathlib import Path

import pytest

from server.report import plot
from server.store import projects as service
from server.web import create_app
from server.web.run_parts import RunPartsCache

with warnings.catch_warnings():
    warnings.simplefilter("ignore")
    from fastapi.testclient import TestClient

DEMOS = Path(__file__).resolve().parents[1] / "demo_projects"


def test_cache_keeps_the_recent_values_within_its_budget_of_observations():
    cache = RunPartsCache(budget=10)
    made: list[str] = []

    def make(name: str):
        return lambda: made.append(name) or name

    assert cache.get(("a",), 4, make("a")) == "a"
    assert cache.get(("b",), 4, make("b")) == "b"
    assert cache.get(("a",), 4, make("a")) == "a"  # kept: not made again, now the most recent
    assert made == ["a", "b"]
    cache.get(("c",), 4, make("c"))  # 12 > 10: the least recently used ("b") goes
    cache.get(("a",), 4, make("a"))
    cache.get(("b",), 4, make("b"))
    assert made == ["a", "b", "c", "b"]
    assert cache.get(("huge",), 11, make("huge")) == "huge"  # larger than the budget: not kept
    cache.get(("huge",), 11, make("huge"))
    assert made.count("huge") == 2


@pytest.fixture
def counted(monkeypatch):
    """Counts of the plot layouts and of the adjustments with presets made from now on."""
    counts = {"plot": 0, "adjusted": 0}
    layout, adjust = plot.network_plot_data, service.adjust_parsed

    def counted_layout(*args, **kwargs):
        counts["plot"] += 1
        return layout(*args, **kwargs)

    def counted_adjust(*args, **kwargs):
        counts["adjusted"] += 1
        return adjust(*args, **kwargs)

    monkeypatch.setattr(plot, "network_plot_data", counted_layout)
    monkeypatch.setattr(service, "adjust_parsed", counted_adjust)
    return counts


def test_pages_and_downloads_of_a_stored_run_make_its_parts_once(tmp_path, counted):
    with TestClient(create_app(tmp_path / "data")) as client:
        url = client.post("/demos/control_network", follow_redirects=False).headers["location"]
        # the adjusting thread made the run's parts once the run was stored, so the first
        # view that follows lays nothing out again
        assert counted == {"plot": 1, "adjusted": 1}
        counted.update(plot=0, adjusted=0)  # from the first view on
        first = client.get(url).text
        assert 'id="np-data"' in first and counted == {"plot": 0, "adjusted": 0}
        assert client.get(url).text == first  # the same page, from the kept parts
        report = client.get(url + "/report.html")
        assert report.status_code == 200 and '<svg class="np-map"' in report.text
        for page in ("?obs_page=2", "/review", "/points.csv", "/report.txt"):
            assert client.get(url + page).status_code == 200
        assert counted == {"plot": 0, "adjusted": 0}  # the stored result, laid out once
        # a preset adjusts again (its tolerance differs from the stored run's), once
        with_preset = url + "?relative=alta-nsps-2026"
        response = client.get(with_preset)
        assert response.status_code == 200, response.text[:300]
        client.get(with_preset)
        client.get(url + "/report.html?relative=alta-nsps-2026")
        client.get(url + "/points.csv?relative=alta-nsps-2026")
        assert counted == {"plot": 1, "adjusted": 1}


def test_review_page_keeps_its_state_until_a_decision_is_queued_or_undone(tmp_path, monkeypatch):
    from server.web import run_parts

    loads = []
    load = run_parts.load_state
    monkeypatch.setattr(run_parts, "load_state", lambda *a: loads.append(1) or load(*a))
    with TestClient(create_app(tmp_path / "data")) as client:
        url = client.post("/demos/leveling_blunder", follow_redirects=False).headers["location"]
        page = client.get(url + "/review").text
        assert client.get(url + "/review").text == page and len(loads) == 1
        token = re.search(r'name="token" value="([0-9a-f]{32})"', page).group(1)
        line = re.findall(r'id="line-(\d+)"', page)[0]
        queued = client.post(
            url + "/edits",
            data={"token": token, "line": line, "action": "exclude", "reason": "checked"},
        )
        assert queued.status_code == 200 and "Queued: leave out" in queued.text
        assert len(loads) == 2  # the queue changed: read afresh
        undo = re.search(r'action="(/projects/[0-9a-f]+/edits/\d+/undo)"', queued.text).group(1)
        undone = client.post(undo, data={"token": token})
        assert undone.status_code == 200 and "Queued: leave out" not in undone.text
        assert len(loads) == 2  # the queue is as at first: that state was kept
