"""``stationfit monitor``: exit statuses, JSON keys of docs/monitoring.md, the text report,
and the weir demo's answer (W-3 settles about 4 mm a year; tools/make_monitoring_demos.py)."""

from __future__ import annotations

import json
from pathlib import Path

import pytest

from server.cli import main
from server.results.types import CAUTION

ROOT = Path(__file__).resolve().parent.parent
DEMO = sorted((ROOT / "demo_projects" / "monitoring").glob("*.fieldbook"))

BOOK = """fieldbook 1
units length=m
epoch {epoch}
point A height=100 fix
level A B {ab} sd=1mm
level B C -0.5120 sd=1mm
level C A -0.7230 sd=1mm
level C D +2.0010 sd=1mm
level D A -1.2760 sd=1mm
"""


def _book(tmp_path: Path, name: str, text: str) -> str:
    path = tmp_path / name
    path.write_text(text, encoding="utf-8")
    return str(path)


def test_the_demo_finds_the_settling_mark_and_its_rate(capsys):
    status = main(
        ["monitor", *map(str, DEMO), "--json", "--period", "365.25", "--threshold", "3mm"]
    )
    out = capsys.readouterr().out
    assert status == 0
    data = json.loads(out)
    assert set(data) == {
        "format",
        "length_unit",
        "dimension",
        "components",
        "settings",
        "epochs",
        "marks",
        "left_out",
        "comparisons",
        "datum",
        "series",
        "notes",
        "caution",
    }
    assert len(data["epochs"]) == 8 and data["components"] == ["H"]
    last = data["comparisons"][-1]
    assert set(last) >= {
        "epochs",
        "steps",
        "stable",
        "moved",
        "displacements",
        "variance_factor",
        "degrees_of_freedom",
        "congruent_set_found",
    }
    assert last["moved"] == ["W-3"]
    assert set(last["steps"][0]) == {
        "stable",
        "omega",
        "rank",
        "statistic",
        "critical",
        "passed",
        "removed",
    }
    series = {(s["mark"], s["component"]): s for s in data["series"]}
    w3 = series[("W-3", "H")]
    # simulated truth: −4 mm/year (tools/make_monitoring_demos.py)
    assert abs(w3["rate"] - -0.004) < 3 * w3["sd_rate"]
    assert w3["rate_significant"] and w3["prediction"]["alarm"]
    assert w3["periodic"]["significant"]
    assert not series[("RB-1", "H")]["prediction"]["alarm"]
    assert data["caution"] == CAUTION


def test_the_text_report_carries_the_caution(capsys):
    assert main(["monitor", str(DEMO[0]), str(DEMO[-1])]) == 0
    out = capsys.readouterr().out
    assert "congruence test" in out and "W-3" in out
    assert CAUTION in out


def test_field_book_errors_exit_2_naming_file_and_line(tmp_path, capsys):
    good = _book(tmp_path, "a.fieldbook", BOOK.format(epoch="2026-01-10", ab="+1.2340"))
    bad = _book(tmp_path, "b.fieldbook", BOOK.format(epoch="2026-13-10", ab="+1.2340"))
    assert main(["monitor", good, bad]) == 2
    err = capsys.readouterr().err
    assert f"{bad}:3:" in err and "Traceback" not in err


def test_epochs_without_common_marks_exit_3_naming_them(tmp_path, capsys):
    first = _book(tmp_path, "a.fieldbook", BOOK.format(epoch="2026-01-10", ab="+1.2340"))
    other = BOOK.format(epoch="2026-02-10", ab="+1.2340")
    for old, new in (("A", "P"), ("B", "Q"), ("C", "R"), ("D", "S")):
        other = other.replace(f" {old} ", f" {new} ").replace(f" {old}\n", f" {new}\n")
    second = _book(tmp_path, "b.fieldbook", other)
    assert main(["monitor", first, second]) == 3
    err = capsys.readouterr().err
    assert "fewer than two marks" in err and "P" in err and "A" in err


def test_three_epochs_need_an_epoch_line(tmp_path, capsys):
    books = [
        _book(
            tmp_path,
            f"{i}.fieldbook",
            BOOK.format(epoch="2026-01-10", ab="+1.2340").replace(
                "epoch 2026-01-10\n", "" if i == 2 else f"epoch 2026-0{i + 1}-10\n"
            ),
        )
        for i in range(3)
    ]
    assert main(["monitor", *books]) == 2
    assert "epoch" in capsys.readouterr().err


@pytest.mark.parametrize(
    "extra", [["--confidence", "1.5"], ["--period", "-3"], ["--threshold", "abc"]]
)
def test_options_that_cannot_be_followed_exit_64(tmp_path, capsys, extra):
    a = _book(tmp_path, "a.fieldbook", BOOK.format(epoch="2026-01-10", ab="+1.2340"))
    b = _book(tmp_path, "b.fieldbook", BOOK.format(epoch="2026-02-10", ab="+1.2351"))
    assert main(["monitor", a, b, *extra]) == 64
    assert "Traceback" not in capsys.readouterr().err


def test_one_book_is_a_usage_error(tmp_path, capsys):
    a = _book(tmp_path, "a.fieldbook", BOOK.format(epoch="2026-01-10", ab="+1.2340"))
    assert main(["monitor", a]) == 64


def test_help_lists_the_exit_statuses(capsys):
    with pytest.raises(SystemExit) as exit_:
        main(["monitor", "--help"])
    assert exit_.value.code == 0
    out = capsys.readouterr().out
    for status in ("0 ", "2 ", "3 ", "64"):
        assert f"  {status}" in out
    assert "--period" in out and "--threshold" in out and "--confidence" in out


def test_prediction_date_and_a_period_in_hours_are_read(capsys):
    books = list(map(str, DEMO))
    status = main(["monitor", *books, "--json", "--period", "8766h", "--predict", "2027-03-10"])
    assert status == 0
    data = json.loads(capsys.readouterr().out)
    assert data["settings"]["period_days"] == 8766 / 24  # 365.25 days
    assert data["settings"]["predict"] == "2027-03-10T00:00:00+00:00"
    prediction = data["series"][0]["prediction"]
    assert prediction["days"] == 730.0  # 2025-03-10 to 2027-03-10
    assert prediction["lower"] < prediction["value"] < prediction["upper"]
