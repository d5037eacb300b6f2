"""Importing a plain CSV of total-station readings (header row, documented columns).

Check values are the face-mean closed forms (docs/references.md "Face means, index error and
vector covariances", recalled textbook relations) and the NIST foot factors
(docs/references.md "Units").
"""

from __future__ import annotations

import math
import re
import subprocess
import sys
from pathlib import Path

import pytest

from server.errors import FieldbookError
from server.formats.csv_observations import read_csv_observations
from server.formats.importing import ImportOptions, import_file
from server.formats.rounds import Tolerances

ROOT = Path(__file__).resolve().parent.parent
DATA = ROOT / "tests" / "data"
SEC = math.radians(1.0 / 3600.0)
DEFAULT = Tolerances(20 * SEC, 5 * SEC, 0.005)


def csv_import(text: str, **units: str):
    return import_file(text.encode(), "r.csv", ImportOptions(DEFAULT, **units))


def test_face_pairs_from_a_csv_are_meaned():
    """FL 45°00′10″ / FR 225°00′20″ → 45°00′15″; zenith 88° / 272°00′04″ → 87°59′58″."""
    text = import_file(
        (DATA / "quarry_lane_readings.csv").read_bytes(), "quarry.csv", ImportOptions(DEFAULT)
    ).text
    assert re.search(r'^  QL2 45:00:15\.00 note="csv lines 2,5: row"$', text, re.M)
    assert re.search(r'^  QL3 120:30:03\.00 note="csv lines 3,4: row"$', text, re.M)
    assert re.search(r"^zenith QL1 QL2 87:59:58\.00 hi=1\.4500m ht=1\.6000m ", text, re.M)
    assert "collimation +4.0″, index error +2.0″" in text
    assert "# the file states no accuracy for: direction, zenith, slope" in text
    assert "defaults centering=0mm" in text
    for line in text.splitlines():
        if line.startswith(("directions", "  ", "zenith", "slope")):
            assert re.search(r'note="csv lines? [0-9,]+: row"', line), line


def test_units_given_to_the_command():
    """usft: 1200/3937 m; the book keeps the unit, the records are SI (NIST)."""
    text = "station,target,hz,slope\nA,B,50.0,3937.0\n"
    data = read_csv_observations(text.encode(), length_unit="usft", angle_unit="gon")
    assert data.readings[0].slope == pytest.approx(1200.0, abs=1e-12)
    assert data.readings[0].hz == pytest.approx(math.pi / 4, abs=1e-15)
    written = csv_import(text, length_unit="ft", angle_unit="deg").text
    assert "units length=ft angle=deg" in written
    assert "slope A B 3937.0000 " in written and "  B 50.0000000 " in written


def test_face_inferred_from_the_zenith_and_semicolons():
    text = "station;target;hz;zenith\nA;B;10:00:00;90:00:00\nA;B;190:00:04;270:00:00\n"
    data = read_csv_observations(text.encode())
    assert [r.face for r in data.readings] == [1, 2]
    assert "  B 10:00:02.00 " in csv_import(text).text


@pytest.mark.parametrize(
    ("text", "line", "words"),
    [
        ("station,target,bearing\nA,B,1\n", 1, "unknown column 'bearing'"),
        ("station,hz\nA,1:00:00\n", 1, "station and target"),
        ("station,target,hz\nA,B,291.1650\n", 2, "not in D:M:S"),
        ("station,target,hz\nA,B\n", 2, "2 fields; the header has 3"),
        ("station,target,slope\nA,B,nan\n", 2, "not a finite number"),
        ("station,target,slope\nA,B,1e300\n", 2, "larger than 100 000 km"),
        ("station,target,hz,face\nA,B,1:00:00,3\n", 2, "is not 1 or 2"),
        ("station,target,hz\nA,A,1:00:00\n", 2, "the target is the station"),
        ('station,target,hz\nA,"B\n', 2, "not a readable CSV"),
        ("station,target,hz\n", 1, "no rows of readings"),
    ],
)
def test_bad_rows_name_their_line(text, line, words):
    with pytest.raises(FieldbookError) as caught:
        read_csv_observations(text.encode(), "bad.csv")
    issue = caught.value.issues[0]
    assert issue.line == line and words in issue.message, issue
    assert str(caught.value).startswith(f"bad.csv:{line}: ")


def test_cli_imports_a_csv_and_exits_2_on_errors(tmp_path):
    proc = subprocess.run(
        [sys.executable, "-m", "server", "import", str(DATA / "quarry_lane_readings.csv")],
        cwd=ROOT,
        capture_output=True,
        text=True,
        timeout=120,
        check=False,
    )
    assert proc.returncode == 0, proc.stderr
    assert proc.stdout.startswith("fieldbook 1\n")
    bad = tmp_path / "bad.csv"
    bad.write_bytes(b"station,target,hz\nA,B,\xff\n")
    proc = subprocess.run(
        [sys.executable, "-m", "server", "import", str(bad)],
        cwd=ROOT,
        capture_output=True,
        text=True,
        timeout=120,
        check=False,
    )
    assert proc.returncode == 2
    assert proc.stderr == f"{bad}:2: this line is not UTF-8 text\n"


def test_a_name_with_a_space_is_changed_with_a_warning():
    result = csv_import("station,target,hz\nA,TREE 4,1:00:00\n")
    assert "  TREE_4 1:00:00.00 " in result.text
    assert result.warnings[0][0] == 2 and "'TREE 4' is written TREE_4" in result.warnings[0][1]
