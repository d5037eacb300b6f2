"""docs/fieldbook.md, the users' manual: every example in it reads and adjusts as printed,
its worked numbers are the program's, and it names every statement, option, flag and unit
the parser accepts, so the manual cannot fall behind the code unnoticed.

Fenced blocks carry their expectation in the info string:

* ```` ```fieldbook ````: a complete field book that must read and adjust;
* ```` ```fieldbook-pending ````: uses syntax arriving in the current release round; until
  it is accepted it may be refused only for that syntax, and once it is accepted this test
  fails so that the block is re-tagged ```` ```fieldbook ````;
* ```` ```fieldbook-refused ````: shows something the program refuses today ("not yet
  supported") and must stay refused while the manual says so.

The worked numbers are hand computations from the propagation formulas (σ² = a² + (b·D)²
+ 2c² and the centering terms of Ghilani, *Adjustment Computations*, 6th ed., 2017, chapter
on weights of angles and distances, recalled from memory) written out in the manual; here
they are held against the program's output.
"""

from __future__ import annotations

import json
import math
import re
from pathlib import Path

import pytest

from server.errors import FieldbookError
from server.fieldbook import model as fieldbook_model
from server.fieldbook.lexer import DIRECTION_ENTRY, GRAMMARS, SD_RULES
from server.pipeline import adjust_fieldbook
from server.units import FILE_ANGLE_UNITS, FILE_LENGTH_UNITS, LENGTH_FACTORS

ROOT = Path(__file__).resolve().parent.parent
MANUAL = ROOT / "docs" / "fieldbook.md"
TEXT = MANUAL.read_text(encoding="utf-8")
SCHEMA_PATH = ROOT / "docs" / "result.schema.json"

_FENCE = re.compile(r"^```([^\n`]*)\n(.*?)^```[ \t]*$", re.S | re.M)
#: Syntax the current release round adds; a pending block may be refused only for these.
PENDING_WORDS = ("relative", "angular", "ratio", "precision")


def _blocks(tag: str) -> list[tuple[int, str]]:
    """(line of the opening fence, text) of every block with info string ``tag``."""
    return [
        (TEXT.count("\n", 0, match.start()) + 1, match.group(2))
        for match in _FENCE.finditer(TEXT)
        if match.group(1).strip() == tag
    ]


EXAMPLES = _blocks("fieldbook")
PENDING = _blocks("fieldbook-pending")
REFUSED = _blocks("fieldbook-refused")


def _block_titled(title: str) -> str:
    found = [text for _, text in EXAMPLES if f'title "{title}"' in text]
    assert len(found) == 1, f"the manual should hold one example titled {title!r}"
    return found[0]


def _adjust(text: str) -> dict:
    return adjust_fieldbook(text, source="manual.fieldbook").to_json_dict()


def _by_line(result: dict) -> dict[int, dict]:
    return {obs["line"]: obs for obs in result["observations"]}


# --------------------------------------------------------------------------- the blocks


def test_the_manual_has_an_example_for_each_job_and_few_pending_ones():
    assert len(EXAMPLES) >= 8
    assert len(PENDING) <= 3, "keep the pending blocks few"
    assert REFUSED
    jobs = TEXT[TEXT.index("## 16. Examples for each job") : TEXT.index("## 17.")]
    for heading in ("### Leveling", "### Traverse", "### Network", "### Boundary check"):
        start = jobs.index(heading)
        end = jobs.find("\n### ", start + 1)
        assert "```fieldbook\n" in jobs[start : end if end > 0 else None], f"no example: {heading}"


@pytest.mark.parametrize("block", EXAMPLES, ids=[f"line{line}" for line, _ in EXAMPLES])
def test_every_example_reads_adjusts_and_passes_its_global_test(block):
    _, text = block
    result = _adjust(text)
    summary = result["summary"]
    assert summary["converged"]
    assert summary["used_observations"] == summary["observations"]
    # a manual's example that failed its own test would teach the wrong thing
    assert summary["global_test"] is not None and summary["global_test"]["passed"]
    assert not [o for o in result["observations"] if o["flagged"]]
    assert not [m for m in result["misclosures"] if m["exceeds"]]
    assert all(r["passed"] is not False for r in result["relative"])


def test_every_example_result_validates_against_the_schema():
    jsonschema = pytest.importorskip("jsonschema")
    validator = jsonschema.Draft202012Validator(json.loads(SCHEMA_PATH.read_text(encoding="utf-8")))
    for line, text in EXAMPLES:
        errors = [error.message for error in validator.iter_errors(_adjust(text))]
        assert errors == [], f"the example at docs/fieldbook.md line {line}: {errors[:3]}"


def test_the_boundary_example_reports_control_to_corner_pairs_only():
    result = _adjust(_block_titled("Lot 14 - corner survey against 2 cm + 50 ppm"))
    pairs = {frozenset((r["from"], r["to"])) for r in result["relative"]}
    corners = {"C1", "C2", "C3", "C4"}
    assert pairs == {frozenset((cp, c)) for cp in ("CP1", "CP2") for c in corners}
    # 2 cm + 50 ppm is met by every pair (the example meets its allowance)
    for pair in result["relative"]:
        assert pair["allowed"] == pytest.approx(0.02 + 50e-6 * pair["distance"], abs=1e-12)
        assert pair["passed"] is True


@pytest.mark.parametrize("block", PENDING, ids=[f"line{line}" for line, _ in PENDING])
def test_pending_examples_are_refused_only_for_the_syntax_still_arriving(block):
    line, text = block
    try:
        _adjust(text)
    except FieldbookError as exc:
        assert exc.issues
        for issue in exc.issues:
            assert any(word in issue.message for word in PENDING_WORDS), (
                f"the pending block at docs/fieldbook.md line {line} fails for another reason "
                f"on its line {issue.line}: {issue.message}"
            )
    else:
        pytest.fail(
            f"the block at docs/fieldbook.md line {line} is accepted now: change its info "
            "string to ```fieldbook and drop 'being added' from the text around it"
        )


def test_the_refused_examples_are_refused_as_the_manual_says():
    assert len(REFUSED) == 1
    (planned,) = (text for _, text in REFUSED)
    with pytest.raises(FieldbookError) as refused:
        _adjust(planned)
    assert [issue.line for issue in refused.value.issues] == [5]  # the planned value '?'
    assert "planned observation" in refused.value.issues[0].message


# --------------------------------------------------------------------------- worked numbers


def test_worked_standard_deviations_match_the_program():
    by_line = _by_line(_adjust(_block_titled("Worked standard deviations")))
    by_kind = {}
    for obs in by_line.values():
        by_kind.setdefault((obs["kind"], obs["to"]), []).append(obs["sd"])
    # hand computations of section 10 (metres and arc-seconds)
    distance = by_kind[("distance", "B")][0]
    assert distance == pytest.approx(math.sqrt(2**2 + 3**2 + 2 * 1**2) * 1e-3, abs=1e-9)
    assert by_kind[("direction", "C")][0] == pytest.approx(2.0922, abs=5e-4)  # 200 m sight
    assert by_kind[("direction", "D")][0] == pytest.approx(3.2801, abs=5e-4)  # 100 m sight
    assert by_kind[("angle", "D")][0] == pytest.approx(4.5845, abs=5e-4)
    levels = sorted(by_kind[("level", "BM-2")] + by_kind[("level", "BM-1")])
    assert levels == pytest.approx([0.5916e-3, 0.8790e-3, 1.3000e-3], abs=1e-7)
    for shown in ("3.61 mm", "3.87 mm", "0.59 mm", "0.88 mm", "1.30 mm", "2.09″", "3.28″", "4.58″"):
        assert shown in TEXT, f"the manual no longer states {shown}"


def test_the_scale_factor_multiplies_the_booked_distance_and_the_ppm_part_uses_the_result():
    block = next(text for _, text in EXAMPLES if "scale factor=0.9996\n" in text)
    (obs,) = _adjust(block)["observations"]
    used = 1500.600 * 0.9996
    assert obs["observed"] == pytest.approx(used, abs=1e-9)
    assert obs["residual"] == pytest.approx(1500.000 - used, abs=1e-9)  # +0.24 mm
    assert obs["sd"] == pytest.approx(math.hypot(2e-3, 2e-6 * used), abs=1e-12)
    # taking the ppm of the booked value instead would differ by 1 µm: tell them apart
    assert abs(obs["sd"] - math.hypot(2e-3, 2e-6 * 1500.600)) > 5e-7
    if "booked" in obs:  # the key arrives in this release round
        assert obs["booked"] == pytest.approx(1500.600, abs=1e-12)
    assert "1500.600 × 0.9996 = 1499.9998 m" in TEXT


def test_the_worked_leveling_loop_is_the_one_the_program_lists():
    result = _adjust(_block_titled("Orchard Lane - two benchmarks and three new marks"))
    loops = [m for m in result["misclosures"] if set(m["points"]) == {"BM-A", "M3", "M1"}]
    assert len(loops) == 1
    loop = loops[0]
    assert loop["kind"] == "loop"
    assert abs(loop["misclosure"]) == pytest.approx(0.0017, abs=1e-9)
    assert loop["length"] == pytest.approx(1410.0)
    assert loop["allowed"] == pytest.approx(0.004 * math.sqrt(1.41), abs=1e-9)
    assert "4 mm × √1.41 = 4.75 mm" in TEXT and "−1.7 mm" in TEXT


def test_the_error_message_shown_in_the_manual_is_the_programs():
    lines = ["defaults level=1mm", "point A height=1 fix"] + ["# filler"] * 9
    lines.append("level A B +0.5 sd=2")
    with pytest.raises(FieldbookError) as caught:
        adjust_fieldbook("\n".join(lines) + "\n", source="lot14.fieldbook")
    shown = str(caught.value).strip()
    assert shown == "lot14.fieldbook:12: '2' needs a unit, e.g. 2mm or 2sec"
    assert f"`{shown}`" in TEXT


# --------------------------------------------------------------------------- completeness


def test_every_statement_option_and_flag_the_parser_takes_is_documented():
    for keyword, grammar in GRAMMARS.items():
        assert f"`{keyword}" in TEXT, f"statement {keyword} is not in the manual"
        for key in grammar.options:
            assert f"{key}=" in TEXT, f"option {key}= of {keyword} is not in the manual"
        for flag in grammar.flags:
            assert f"`{flag}`" in TEXT or f"| {flag} " in TEXT or f"[{flag}" in TEXT
    for key in DIRECTION_ENTRY.options:
        assert f"{key}=" in TEXT
    for kind in SD_RULES:
        assert f"{kind}=" in TEXT
    for word in ("relative A B", "precision=", "angular=", "ratio=1:"):
        assert word in TEXT


def test_every_unit_and_default_is_documented():
    for unit in (*LENGTH_FACTORS, *FILE_LENGTH_UNITS, *FILE_ANGLE_UNITS, "ppm", "sec", "mgon"):
        assert f"`{unit}`" in TEXT, f"unit {unit} is not in the manual"
    assert "exactly 0.3048 m" in TEXT and "exactly 1200/3937 m" in TEXT
    levels = fieldbook_model.TestLevels()
    for key in ("alpha", "snooping", "power", "confidence"):
        row = re.search(rf"^\| `{key}=` \| ([0-9.]+) \|", TEXT, re.M)
        assert row is not None, f"the tests table has no row for {key}="
        assert float(row.group(1)) == getattr(levels, key), f"the default of {key} is wrong"
    assert "| `precision=` | `posterior` |" in TEXT


def _slug(heading: str) -> str:
    """The anchor a Markdown renderer gives a heading (lower case, punctuation dropped)."""
    text = re.sub(r"[^\w\- ]", "", heading.strip().lower().replace("`", ""))
    return text.replace(" ", "-")


def test_links_to_the_manual_and_inside_it_resolve_and_nothing_points_outside_the_repository():
    anchors = {_slug(h) for h in re.findall(r"^#+ (.+)$", TEXT, re.M)}
    sources = [ROOT / "README.md", ROOT / "DEVELOPERS.md", *sorted((ROOT / "docs").glob("*.md"))]
    checked = 0
    for source in sources:
        for target in re.findall(r"\]\(([^)\s]+)\)", source.read_text(encoding="utf-8")):
            if target.startswith(("http://", "https://", "mailto:")):
                continue
            path, _, anchor = target.partition("#")
            resolved = (source.parent / path).resolve() if path else source
            assert resolved.is_file(), f"{source.name} links to missing {target}"
            assert ROOT in resolved.parents
            if anchor and resolved == MANUAL:
                assert anchor in anchors, f"{source.name} links to missing anchor #{anchor}"
                checked += 1
    assert checked >= 20


def test_readme_links_the_manual_and_the_schema():
    readme = (ROOT / "README.md").read_text(encoding="utf-8")
    assert "(docs/fieldbook.md)" in readme
    assert "(docs/result.schema.json)" in readme


def _dms(text: str) -> float:
    degrees, minutes, seconds = (float(part) for part in text.split(":"))
    return degrees + minutes / 60.0 + seconds / 3600.0


def test_the_worked_traverse_closure_once_closures_are_computed():
    """Section 13's closure of the section 16 traverse, carried by hand here: azimuths
    forward through the booked angles from MON-B→MON-A, legs laid off from MON-B."""
    block = _block_titled("Quarry road - traverse from MON-B to MON-C")
    known = {
        "MON-A": (5000.000, 8000.000),
        "MON-B": (5320.417, 7912.336),
        "MON-C": (6502.918, 7890.071),
        "MON-D": (6780.552, 8140.225),
    }
    angles = [
        _dms(v) for v in ("131:12:39.1", "242:32:38.2", "130:33:56.1", "234:15:51.6", "104:05:49.7")
    ]
    legs = [348.7595, 336.1301, 357.9607, 315.9046]

    def azimuth(a, b):
        return math.degrees(math.atan2(b[0] - a[0], b[1] - a[1])) % 360.0

    def carry(correction: float) -> tuple[float, float]:
        """Angular misclosure (″) and linear misclosure with each angle less ``correction``."""
        heading = azimuth(known["MON-B"], known["MON-A"])
        east, north = known["MON-B"]
        for k, angle in enumerate(angles):
            heading = (heading + angle - correction) % 360.0
            if k < len(legs):
                east += legs[k] * math.sin(math.radians(heading))
                north += legs[k] * math.cos(math.radians(heading))
                heading = (heading + 180.0) % 360.0
        closing = azimuth(known["MON-C"], known["MON-D"])
        angular = ((heading - closing + 180.0) % 360.0 - 180.0) * 3600.0
        return angular, math.hypot(east - known["MON-C"][0], north - known["MON-C"][1])

    angular, raw_linear = carry(0.0)
    # the linear closure as booked, and after the angular misclosure is spread over the angles
    linear_options = (raw_linear, carry(angular / 3600.0 / len(angles))[1])
    length = sum(legs)
    assert abs(angular) == pytest.approx(9.6, abs=0.05)
    assert length == pytest.approx(1358.75, abs=0.005)
    assert "9.6″" in TEXT and "1358.75 m" in TEXT and "22.4″" in TEXT and "0.136 m" in TEXT

    with_allowances = block.replace(
        "tolerance relative=2cm+50ppm",
        "tolerance relative=2cm+50ppm angular=10sec/sqrtn ratio=1:10000",
    )
    result = _adjust(with_allowances)
    traverses = [m for m in result["misclosures"] if m["kind"] == "traverse"]
    assert len(traverses) == 1
    closure = traverses[0]
    assert closure["angle_stations"] == 5
    assert abs(closure["angular_misclosure"]) == pytest.approx(abs(angular), abs=0.01)
    assert closure["angular_allowed"] == pytest.approx(10.0 * math.sqrt(5), abs=1e-6)
    # the manual says the angular misclosure is spread equally over the angles first
    assert closure["misclosure"] == pytest.approx(linear_options[1], abs=1e-5)
    assert abs(linear_options[0] - linear_options[1]) > 0.02  # the two readings differ
    assert closure["length"] == pytest.approx(length, abs=1e-6)
    assert closure["ratio"] == pytest.approx(length / linear_options[1], rel=1e-3)
    assert closure["ratio_allowed"] == 10000
    assert closure["allowed"] == pytest.approx(length / 10000, abs=1e-6)
    assert closure["exceeds"] is False
