"""A monitoring job as the JSON object of ``docs/monitoring.md`` and as a plain-text report.

The keys are documented there and keep their meaning; lengths are in ``length_unit``, rates in
length unit per year, angles (ellipse azimuth, phase) in degrees.
"""

from __future__ import annotations

from server.monitoring.congruence import Congruence, Displacement
from server.monitoring.job import Monitoring, finite
from server.monitoring.timeseries import SeriesFit
from server.results.types import CAUTION

FORMAT = 1


def monitoring_json(job: Monitoring) -> dict[str, object]:
    o = job.options
    return {
        "format": FORMAT,
        "length_unit": job.length_unit,
        "dimension": job.dimension,
        "components": _components(job.dimension),
        "settings": {
            "confidence": o.confidence,
            "period_days": o.period_days,
            "threshold": o.threshold,
            "predict": None if o.predict is None else o.predict.isoformat(),
        },
        "epochs": [
            {
                "source": e.source,
                "epoch": None if e.when is None else e.when.isoformat(),
                "title": e.result.title,
                "redundancy": e.redundancy,
                "vtpv": e.vtpv,
                "variance_factor": e.variance_factor,
            }
            for e in job.epochs
        ],
        "marks": list(job.marks),
        "left_out": list(job.left_out),
        "comparisons": [_comparison(job, i, c) for i, c in enumerate(job.comparisons)],
        "datum": list(job.datum),
        "series": [_series(f) for f in job.series],
        "notes": list(job.notes),
        "caution": CAUTION,
    }


def _components(dimension: int) -> list[str]:
    return {1: ["H"], 2: ["E", "N"], 3: ["E", "N", "H"]}[dimension]


def _comparison(job: Monitoring, index: int, c: Congruence) -> dict[str, object]:
    return {
        "epochs": [0, index + 1],
        "variance_factor": c.variance_factor,
        "degrees_of_freedom": c.degrees_of_freedom,
        "alpha": c.alpha,
        "steps": [
            {
                "stable": list(s.stable),
                "omega": s.omega,
                "rank": s.rank,
                "statistic": finite(s.statistic),
                "critical": s.critical,
                "passed": s.passed,
                "removed": s.removed,
            }
            for s in c.steps
        ],
        "congruent_set_found": c.congruent_set_found,
        "stable": list(c.stable),
        "moved": list(c.moved),
        "displacements": [_displacement(d) for d in c.displacements],
    }


def _displacement(d: Displacement) -> dict[str, object]:
    ellipse = None
    if d.ellipse is not None:
        ellipse = {"semi_major": d.ellipse[0], "semi_minor": d.ellipse[1], "azimuth": d.ellipse[2]}
    return {
        "mark": d.mark,
        "stable": d.stable,
        "components": list(d.components),
        "sd": list(d.sd),
        "length": d.length,
        "sd_length": d.sd_length,
        "ellipse": ellipse,
        "statistic": finite(d.statistic),
        "critical": d.critical,
        "significant": d.significant,
        "alarm": d.alarm,
    }


def _series(f: SeriesFit) -> dict[str, object]:
    periodic = None
    if f.periodic is not None:
        p = f.periodic
        periodic = {
            "period_days": p.period_days,
            "a": p.a,
            "b": p.b,
            "amplitude": p.amplitude,
            "sd_amplitude": p.sd_amplitude,
            "phase": p.phase,
            "sd_phase": p.sd_phase,
            "statistic": finite(p.statistic),
            "critical": p.critical,
            "significant": p.significant,
        }
    prediction = None
    if f.prediction is not None:
        q = f.prediction
        prediction = {
            "days": q.days,
            "value": q.value,
            "sd": q.sd,
            "lower": q.lower,
            "upper": q.upper,
            "movement": q.movement,
            "sd_movement": q.sd_movement,
            "alarm": q.alarm,
        }
    return {
        "mark": f.mark,
        "component": f.component,
        "epochs": f.epochs,
        "redundancy": f.redundancy,
        "variance_factor": f.variance_factor,
        "offset": f.offset,
        "rate": f.rate,
        "sd_rate": f.sd_rate,
        "rate_statistic": finite(f.rate_statistic),
        "rate_critical": f.rate_critical,
        "rate_significant": f.rate_significant,
        "periodic": periodic,
        "fitted": list(f.fitted),
        "residuals": list(f.residuals),
        "prediction": prediction,
    }


def monitoring_text(job: Monitoring) -> str:
    """The terminal report: epochs, test steps, displacements, time series, caution."""
    u = job.length_unit
    mm = 1000.0 if u == "m" else 1.0
    small = "mm" if u == "m" else u
    lines = [
        f"Stationfit monitoring: {len(job.epochs)} epochs, components "
        f"{'/'.join(_components(job.dimension))}, {len(job.marks)} common marks",
        "",
    ]
    lines.append("Epochs")
    for i, e in enumerate(job.epochs):
        when = "no epoch" if e.when is None else e.when.isoformat()
        lines.append(
            f"  {i}  {when:<25} r={e.redundancy:<4} s0²={e.variance_factor:8.3f}  {e.source}"
        )
    for i, c in enumerate(job.comparisons):
        lines += [
            "",
            f"Epoch 0 against epoch {i + 1}: congruence test "
            f"(s0²={c.variance_factor:.3f}, f={c.degrees_of_freedom}, α={c.alpha:g})",
        ]
        for s in c.steps:
            verdict = "congruent" if s.passed else "rejected"
            after = f", {s.removed} leaves the stable set" if s.removed else ""
            lines.append(
                f"  {len(s.stable):3d} marks  T={s.statistic:9.3f}  "
                f"F(h={s.rank})={s.critical:7.3f}  {verdict}{after}"
            )
        if not c.congruent_set_found:
            lines.append(
                "  no congruent set of marks found: displacements are on the datum of all marks"
            )
        lines.append(f"  stable: {', '.join(c.stable) or 'none'}")
        lines.append(f"  moved:  {', '.join(c.moved) or 'none'}")
        head = "".join(f"{'d' + k + ' ' + small:>11}" for k in _components(job.dimension))
        lines.append(f"  {'mark':<14}{head}{'length':>10}{'sd':>8}{'T':>9}{'F':>8}  flags")
        for d in c.displacements:
            comps = "".join(f"{x * mm:11.2f}" for x in d.components)
            test = "" if d.statistic is None else f"{d.statistic:9.2f}{d.critical:8.2f}"
            flags = " ".join(
                w
                for w, on in (
                    ("stable", d.stable),
                    ("SIGNIFICANT", d.significant),
                    ("ALARM", d.alarm),
                )
                if on
            )
            lines.append(
                f"  {d.mark:<14}{comps}{d.length * mm:10.2f}{d.sd_length * mm:8.2f}"
                f"{test:>17}  {flags}"
            )
    if job.series:
        lines += ["", f"Time series on the datum of {', '.join(job.datum)} (rate in {small}/year)"]
        for f in job.series:
            text = (
                f"  {f.mark:<14}{f.component}  rate {f.rate * mm:8.2f} ± "
                f"{f.sd_rate * mm:6.2f}{' *' if f.rate_significant else '  '}"
            )
            if f.periodic is not None:
                p = f.periodic
                text += (
                    f"  amplitude {p.amplitude * mm:7.2f} ± {p.sd_amplitude * mm:5.2f} "
                    f"phase {p.phase:7.1f}°{' *' if p.significant else '  '}"
                )
            if f.prediction is not None:
                q = f.prediction
                text += (
                    f"  movement {q.movement * mm:8.2f} ± {q.sd_movement * mm:5.2f}"
                    f"{'  ALARM' if q.alarm else ''}"
                )
            lines.append(text)
        lines.append("  * significant at the chosen confidence")
    for note in job.notes:
        lines.append(f"Note: {note}")
    lines += ["", CAUTION, ""]
    return "\n".join(lines)
