"""Imported records → field book text, every line naming the element (and line) it came from.

Observations carry ``note="xml line N: Element"``; statements that take no note (units, crs,
defaults) carry the same words as a trailing comment.  Raw readings stay in the text as a
comment table above each setup's reduced lines, and every warning of the reduction is a
comment just above the line it concerns (and returned, for stderr).  Nothing the crew did
not state is invented: a missing accuracy is left for the user, with a comment saying so.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

from server.formats.rounds import ReducedSetup, ReducedTarget, Tolerances, reduce_readings
from server.formats.survey_records import (
    Accuracy,
    ControlPoint,
    GnssVector,
    RawReading,
    Source,
    SurveyData,
)
from server.units import format_dms

LENGTH_FACTORS = {"m": 1.0, "ft": 0.3048, "usft": 1200.0 / 3937.0}


@dataclass(frozen=True, slots=True)
class Imported:
    """The written field book and the warnings, each with the line of the input it names."""

    text: str
    warnings: tuple[tuple[int, str], ...]


def vector_sd_corr(
    cov: tuple[float, float, float, float, float, float],
) -> tuple[tuple[float, float, float], tuple[float, float, float]]:
    """(sx, sy, sz), (rxy, rxz, ryz) of a covariance (xx, xy, xz, yy, yz, zz): s = √diag,
    r_ij = C_ij / (s_i·s_j)."""
    xx, xy, xz, yy, yz, zz = cov
    sx, sy, sz = math.sqrt(xx), math.sqrt(yy), math.sqrt(zz)
    return (sx, sy, sz), (xy / (sx * sy), xz / (sx * sz), yz / (sy * sz))


class _Writer:
    def __init__(self, data: SurveyData, tol: Tolerances) -> None:
        self.data, self.tol = data, tol
        self.length_unit = data.units.fieldbook_length
        self.angle_unit = data.units.fieldbook_angle
        self.lines: list[str] = []
        self.warnings: list[tuple[int, str]] = list(data.warnings)
        self.current: Accuracy | None = None
        self.attached: dict[tuple[int, str], list[tuple[int, str]]] = {}
        #: "xml" or "csv": how the warnings name their line
        self.kind = next((r.source.kind for r in data.readings), "xml")
        self._raw_key: ReducedSetup | None = None
        self._raw: dict[str, list[RawReading]] = {}

    # ---- formatting

    def length(self, metres: float, decimals: int = 4) -> str:
        return f"{metres / LENGTH_FACTORS[self.length_unit]:.{decimals}f}"

    def length_option(self, metres: float) -> str:
        return f"{self.length(metres)}{self.length_unit}"

    def angle(self, radians: float, extra: int = 0) -> str:
        degrees = math.degrees(radians)
        if self.angle_unit == "dms":
            return format_dms(degrees, 2 + extra)
        if self.angle_unit == "gon":
            return f"{degrees / 0.9:.{7 + extra}f}"
        return f"{degrees:.{7 + extra}f}"

    def warn(self, line: int, message: str) -> None:
        self.warnings.append((line, message))
        self.lines.append(f"# WARNING ({self.kind} line {line}): {message}")

    # ---- sections

    def header(self) -> None:
        units = self.data.units
        self.lines.append("fieldbook 1")
        self.lines.append("# imported: each line names its source; raw readings are in comments")
        if self.data.title:
            title = self.data.title.replace("\\", "\\\\").replace('"', '\\"')
            where = f"  # {self.data.title_source.note()}" if self.data.title_source else ""
            self.lines.append(f'title "{title[:200]}"{where}')
        where = (
            f"  # {units.source.note()}"
            if units.source
            else "  # the file states no units: those given to the import command"
        )
        self.lines.append(f"units length={self.length_unit} angle={self.angle_unit}{where}")
        if self.data.crs and self.data.crs_source:
            self.lines.append(f"crs {self.data.crs}  # {self.data.crs_source.note()}")
        else:
            self.lines.append(
                "# the file names no coordinate reference system: add a crs line "
                "(crs EPSG:CODE, or crs local lat=.. lon=..) for slope, zenith "
                "and baseline"
            )

    def defaults(self) -> None:
        first = self.data.readings[0].instrument if self.data.readings else ""
        self.instrument_defaults(self.accuracy_of(first))
        if self.data.vectors and any(v.covariance is None for v in self.data.vectors):
            self.lines.append(
                "# some vectors carry no covariance: give them sd= or a "
                "'defaults baseline=' line (nothing is assumed)"
            )
        if self.data.readings:
            self.lines.append(
                "defaults centering=0mm  # the file states no centering: set your crew's value"
            )
        self.lines.append(
            f"# reduction tolerances: face difference {_sec_abs(self.tol.face)}, spread of sets "
            f"{_sec_abs(self.tol.spread)}, slope distances {self.tol.distance * 1000:.1f} mm"
        )

    def accuracy_of(self, instrument: str) -> Accuracy | None:
        """The setup's instrument, by its instrumentDetailsID; else the only (or first) one."""
        accuracies = self.data.accuracies
        named = next((a for a in accuracies if a.name == instrument), None)
        return named or (accuracies[0] if accuracies else None)

    def instrument_defaults(self, accuracy: Accuracy | None) -> None:
        """A defaults line with what this instrument states, and a comment naming the rest."""
        previous, self.current = self.current, accuracy
        parts, missing = (
            _accuracy_parts(accuracy) if accuracy else ([], ["direction", "zenith", "slope"])
        )
        if previous is not None and accuracy is not None:
            # a defaults line only sets the kinds it names: the others stay the previous
            # instrument's, which this instrument never stated
            inherited = [k for k in missing if k not in _accuracy_parts(previous)[1]]
            if inherited:
                self.warn(
                    accuracy.source.line,
                    f"{accuracy.name} states no accuracy for {', '.join(inherited)}: the "
                    f"defaults of {previous.name} stay in force for its setups; write its own",
                )
        if parts and accuracy is not None:
            self.lines.append(
                f"defaults {' '.join(parts)}  # {accuracy.source.note()} {accuracy.name} "
                "(angle precisions apply to face means, ISO 17123-3)"
            )
        if self.data.readings and missing:
            self.lines.append(
                f"# the file states no accuracy for: {', '.join(missing)}; add "
                "them to a defaults line (nothing is assumed)"
            )

    def points(self) -> None:
        seen: set[str] = set()
        if self.data.points:
            self.lines.append("")
        for point in self.data.points:
            if point.name in seen:
                self.warn(
                    point.source.line,
                    f"point {point.name} is given again: this CgPoint is left out",
                )
                continue
            seen.add(point.name)
            self.lines.append(self.point(point))

    def point(self, point: ControlPoint) -> str:
        words = [f"point {point.name}"]
        if point.east is not None and point.north is not None:
            words += [f"east={self.length(point.east)}", f"north={self.length(point.north)}"]
        elif point.lat is not None and point.lon is not None:
            words += [f"lat={self.angle(point.lat, 3)}", f"lon={self.angle(point.lon, 3)}"]
        if point.height is not None:
            words.append(f"height={self.length(point.height)}")
        if point.control:
            words += self.control_options(point)
        words.append(f'note="{point.source.note()}"')
        return " ".join(words)

    def control_options(self, point: ControlPoint) -> list[str]:
        """Control: a component with a stated standard error is weighted, the others fixed."""
        has_en = (point.east is not None and point.north is not None) or (
            point.lat is not None and point.lon is not None
        )
        has_h = point.height is not None
        en_weighted = has_en and point.sd_en is not None
        h_weighted = has_h and point.sd_h is not None
        options = []
        if en_weighted:
            options.append(f"sd_en={self.length_option(point.sd_en)}")  # type: ignore[arg-type]
        if h_weighted:
            options.append(f"sd_h={self.length_option(point.sd_h)}")  # type: ignore[arg-type]
        fixed = ("en" if has_en and not en_weighted else "") + (
            "h" if has_h and not h_weighted else ""
        )
        given = ("en" if has_en else "") + ("h" if has_h else "")
        if fixed:
            options.append("fix" if fixed == given else f"fix={fixed}")
        return options

    def setup(self, setup: ReducedSetup, accuracy: Accuracy | None) -> None:
        hi = f", hi {self.length(setup.hi)} {self.length_unit}" if setup.hi is not None else ""
        errors = []
        if setup.collimation is not None:
            errors.append(f"collimation {_sec(setup.collimation)}")
        if setup.index_error is not None:
            errors.append(f"index error {_sec(setup.index_error)}")
        self.lines += [
            "",
            f"# setup at {setup.station} (setup {setup.setup}){hi}"
            + (f"; {', '.join(errors)} (mean of the face pairs)" if errors else ""),
        ]
        self.raw_table(setup)
        self.attached = _attach_warnings(setup)
        placed = {w for found in self.attached.values() for w in found}
        for line, message in setup.warnings:
            if (line, message) in placed:
                self.warnings.append((line, message))  # written on its own line below
            else:
                self.warn(line, message)
        self.directions(setup.station, setup.targets, accuracy)
        for group in setup.separate:
            self.directions(setup.station, group, accuracy)
        for target in setup.targets:
            self.zenith_slope(setup, target, accuracy)

    def inline(self, target: ReducedTarget, kind: str) -> str:
        """The warnings about this value, as a comment at the end of its line."""
        found = self.attached.get((id(target), kind), [])
        return "".join(
            f"  # WARNING ({self.kind} line {line}): {message}" for line, message in found
        )

    def raw_by_target(self, setup: ReducedSetup) -> dict[str, list[RawReading]]:
        """The setup's readings by target, computed once per setup."""
        if self._raw_key is not setup:
            self._raw_key, self._raw = setup, {}
            for reading in setup.raw:
                self._raw.setdefault(reading.target, []).append(reading)
        return self._raw

    def raw_table(self, setup: ReducedSetup) -> None:
        self.lines.append("# raw:  line  target  face  set  direction  zenith  slope  ht")
        for r in setup.raw:
            cells = [
                str(r.source.line),
                r.target,
                "I" if r.face == 1 else "II",
                r.set_id or "-",
                self.angle(r.hz) if r.hz is not None else "-",
                self.angle(r.zenith) if r.zenith is not None else "-",
                self.length(r.slope) if r.slope is not None else "-",
                self.length(r.ht) if r.ht is not None else "-",
            ]
            self.lines.append("# raw:  " + "  ".join(cells) + ("  unused" if r.unused else ""))

    def directions(
        self, station: str, targets: tuple[ReducedTarget, ...], accuracy: Accuracy | None
    ) -> None:
        rows = [t for t in targets if t.hz is not None]
        if not rows:
            return
        sources = tuple(s for t in rows for s in t.hz_sources)
        self.lines.append(f'directions {station} note="{_notes(sources)}"')
        for target in rows:
            sd = _sd(accuracy.direction if accuracy else None, target.hz_factor)
            spread = (
                f"  # spread {_sec_abs(target.hz_spread)} over {target.hz_sets} sets"
                if target.hz_spread is not None
                else ""
            )
            self.lines.append(
                f"  {target.target} {self.angle(target.hz)}{sd} "  # type: ignore[arg-type]
                f'note="{_notes(target.hz_sources)}"{spread}' + self.inline(target, "direction")
            )
        self.lines.append("end")

    def zenith_slope(
        self, setup: ReducedSetup, target: ReducedTarget, accuracy: Accuracy | None
    ) -> None:
        heights = ""
        if setup.hi is not None:
            heights += f" hi={self.length_option(setup.hi)}"
        if target.ht is not None:
            heights += f" ht={self.length_option(target.ht)}"

        def note(kind: str) -> str:
            sources = [
                r.source
                for r in self.raw_by_target(setup).get(target.target, ())
                if getattr(r, kind) is not None and not r.unused
            ]
            return f'note="{_notes(tuple(sources))}"'

        if target.zenith is not None:
            sd = _sd(accuracy.zenith if accuracy else None, target.zenith_factor)
            spread = (
                f"  # spread {_sec_abs(target.zenith_spread)} over {target.zenith_sets} sets"
                if target.zenith_spread is not None
                else ""
            )
            self.lines.append(
                f"zenith {setup.station} {target.target} "
                f"{self.angle(target.zenith)}{sd}{heights} {note('zenith')}{spread}"
                + self.inline(target, "zenith")
            )
        if target.slope is not None:
            spread = (
                f"  # spread {target.slope_spread * 1000:.1f} mm"
                if target.slope_spread is not None
                else ""
            )
            self.lines.append(
                f"slope {setup.station} {target.target} "
                f"{self.length(target.slope)}{heights} {note('slope')}{spread}"
                + self.inline(target, "slope")
            )

    def vector(self, vector: GnssVector) -> None:
        values = " ".join(self.length(v) for v in (vector.dx, vector.dy, vector.dz))
        options = ""
        if vector.covariance is not None:
            sd, corr = vector_sd_corr(vector.covariance)
            options = (
                " sd="
                + ",".join(f"{s * 1000:.4f}mm" for s in sd)
                + " corr="
                + ",".join(f"{r:.6f}" for r in corr)
            )
        else:
            self.warn(
                vector.source.line,
                "this vector has no covariance: give sd= or a 'defaults baseline=' line",
            )
        self.lines.append(
            f"baseline {vector.from_point} {vector.to_point} {values}{options} "
            f'note="{vector.source.note()}"'
        )

    def write(self) -> Imported:
        self.header()
        self.defaults()
        self.points()
        for setup in reduce_readings(self.data.readings, self.tol):
            accuracy = self.accuracy_of(setup.raw[0].instrument)
            if accuracy is not self.current:
                self.lines.append("")
                self.instrument_defaults(accuracy)
            self.setup(setup, accuracy)
        if self.data.vectors:
            self.lines.append("")
        for vector in self.data.vectors:
            self.vector(vector)
        return Imported("\n".join(self.lines) + "\n", tuple(sorted(set(self.warnings))))


_KIND_WORDS = {
    "direction": ("of the direction",),
    "zenith": ("of the zenith", "target height"),
    "slope": ("slope distance", "target height"),
}


def _attach_warnings(setup: ReducedSetup) -> dict[tuple[int, str], list[tuple[int, str]]]:
    """Which of the setup's warnings belong on which written line: a warning names the first
    reading of its face pair or target, and says which quantity it is about."""
    attached: dict[tuple[int, str], list[tuple[int, str]]] = {}
    targets = (*setup.targets, *(t for group in setup.separate for t in group))
    for target in targets:
        lines = {
            "direction": {s.line for s in target.hz_sources} if target.hz is not None else set(),
            "zenith": {s.line for s in target.sources} if target.zenith is not None else set(),
            "slope": {s.line for s in target.sources} if target.slope is not None else set(),
        }
        for kind, words in _KIND_WORDS.items():
            found = [
                (line, message)
                for line, message in setup.warnings
                if line in lines[kind] and any(word in message for word in words)
            ]
            if found:
                attached[(id(target), kind)] = found
    return attached


def _accuracy_parts(accuracy: Accuracy) -> tuple[list[str], list[str]]:
    parts, missing = [], []
    for kind, value in (("direction", accuracy.direction), ("zenith", accuracy.zenith)):
        if value is None:
            missing.append(kind)
        else:
            parts.append(f"{kind}={_sec_value(value)}sec")
    constant, ppm = accuracy.distance_constant, accuracy.distance_ppm
    if constant is None and not ppm:
        missing.append("slope")
    elif constant is None:
        parts.append(f"slope={ppm:g}ppm")
    else:
        parts.append(f"slope={constant * 1000:g}mm" + (f"+{ppm:g}ppm" if ppm else ""))
    return parts, missing


def _sec_value(radians: float) -> str:
    # six significant digits: a stated precision in gon or decimal degrees (0.3 mgon =
    # 0.972″, 1.061″) keeps its weight; three would round it by up to half a percent
    return f"{math.degrees(radians) * 3600.0:.6g}"


def _sec(radians: float) -> str:
    return f"{math.degrees(radians) * 3600.0:+.1f}″"


def _sec_abs(radians: float) -> str:
    return f"{abs(math.degrees(radians)) * 3600.0:.1f}″"


def _sd(sigma: float | None, factor: float) -> str:
    """σ·√factor: a mean of n face means has σ/√n, one face alone σ·√2 (ISO 17123-3 states σ
    for a direction observed in both faces); a single face mean keeps the default σ."""
    if sigma is None or abs(factor - 1.0) < 1e-12:
        return ""
    return f" sd={math.degrees(sigma * math.sqrt(factor)) * 3600.0:.3f}sec"


def _notes(sources: tuple[Source, ...]) -> str:
    lines = sorted({s.line for s in sources})
    elements = sorted({s.element for s in sources})
    kind = sources[0].kind
    label = "line" if len(lines) == 1 else "lines"
    return f"{kind} {label} {','.join(map(str, lines))}: {'/'.join(elements)}"


def write_fieldbook(data: SurveyData, tol: Tolerances) -> Imported:
    """The field book text for ``data`` and the warnings of its reduction."""
    return _Writer(data, tol).write()
