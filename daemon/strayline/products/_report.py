"""The scan report's content: summary statistics as plain JSON-ready values, and its
short Markdown rendering. Pure functions; :mod:`strayline.products` writes the files.

Statistics are over committed pixels only; field values are in SI units (T, A, counts/s,
Hz) with the unit stated beside each block, so the JSON is read without guessing.
"""

from __future__ import annotations

import math
from collections import Counter
from collections.abc import Mapping, Sequence
from typing import Any

import numpy as np

from strayline.alerts import AlertEvent
from strayline.field import FIELD_BOUND_LEVEL
from strayline.fit import FitStatus
from strayline.products._maps import TraceMaps, VectorField, contrast_map
from strayline.products.calibration import CalibrationUse

__all__ = [
    "REPORT_FORMAT",
    "REPORT_FORMAT_VERSION",
    "alert_summary",
    "calibration_summary",
    "distribution",
    "percent_text",
    "report_markdown",
    "status_fractions",
    "trace_summary",
    "vector_summary",
]

REPORT_FORMAT = "strayline-products-report"
REPORT_FORMAT_VERSION = 1
_PERCENTILES = (5.0, 25.0, 50.0, 75.0, 95.0)


def distribution(values: np.ndarray, unit: str) -> dict[str, Any] | None:
    """Median, 5/25/75/95th percentiles, min, max and count of the finite values.

    Returns None when there is no finite value.
    """
    finite = np.asarray(values, dtype=np.float64)
    finite = finite[np.isfinite(finite)]
    if finite.size == 0:
        return None
    p5, p25, p50, p75, p95 = (float(v) for v in np.percentile(finite, _PERCENTILES))
    return {
        "unit": unit,
        "count": int(finite.size),
        "median": p50,
        "p5": p5,
        "p25": p25,
        "p75": p75,
        "p95": p95,
        "min": float(finite.min()),
        "max": float(finite.max()),
    }


def _median(values: np.ndarray) -> float | None:
    finite = np.asarray(values, dtype=np.float64)
    finite = finite[np.isfinite(finite)]
    return float(np.median(finite)) if finite.size else None


def status_fractions(status: np.ndarray) -> dict[str, float]:
    """Fraction of pixels per fit status (every :class:`FitStatus` named, zeros included).

    Parameters
    ----------
    status : ndarray of uint8, shape (n,)
        Status codes of written pixels.
    """
    codes = np.asarray(status).ravel()
    total = codes.size
    return {
        member.name.lower(): (float(np.count_nonzero(codes == member)) / total if total else 0.0)
        for member in FitStatus
    }


def percent_text(fraction: float) -> str:
    """A fraction as a percentage with one decimal, for every place a share of pixels is
    shown (report, quick-look legend): a share above 0 that would round to "0.0 %" reads
    "< 0.1 %", one below 1 that would round to "100.0 %" reads "> 99.9 %"."""
    if 0.0 < fraction < 0.0005:
        return "< 0.1 %"
    if 0.9995 <= fraction < 1.0:
        return "> 99.9 %"
    return f"{100.0 * fraction:.1f} %"


def trace_summary(trace: TraceMaps) -> dict[str, Any]:
    """Lines, pixels, fit outcome and medians of one trace's committed pixels."""
    rows = trace.committed
    maps = {name: np.asarray(values)[rows] for name, values in trace.maps.items()}
    fractions = status_fractions(maps["status"])
    return {
        "lines_committed": trace.n_lines_committed,
        "line_range": [int(trace.line_index.min()), int(trace.line_index.max())],
        "pixels_per_line": trace.shape[1],
        "pixels_committed": int(maps["status"].size),
        "x_range_m": [float(trace.x_m[0]), float(trace.x_m[-1])],
        "y_range_m": [float(trace.y_m[0]), float(trace.y_m[-1])],
        "pixel_m": {"y": trace.pixel_m[0], "x": trace.pixel_m[1]},
        "fit_ok_fraction": fractions["ok"],
        "fit_status_fractions": fractions,
        "field_nv_t": distribution(maps["field_nv_t"], "T"),
        "field_nv_sigma_t_median": _median(maps["field_nv_sigma_t"]),
        "field_nv_bound_t": distribution(maps["field_nv_bound_t"], "T"),
        "pl_rate_cps_median": _median(maps["pl_rate_cps"]),
        "contrast_median": _median(contrast_map(trace)[rows]),
        "contrast_lo_median": _median(maps["contrast_lo"]),
        "contrast_hi_median": _median(maps["contrast_hi"]),
        "fwhm_hz_median": _median(maps["fwhm_hz"]),
        "chi2_red_median": _median(maps["chi2_red"]),
    }


def vector_summary(vector: VectorField) -> dict[str, Any]:
    """Spread of the reconstructed components (and m_z), and how much was filled in."""
    measured = ~vector.filled
    out: dict[str, Any] = {
        "filled_fraction": float(np.mean(vector.filled)),
        "uniform_part": "removed (not recoverable from one projection)",
    }
    for name, values in zip(("bx_t", "by_t", "bz_t"), vector.b_xyz_t, strict=True):
        out[name] = distribution(values[measured], "T")
    if vector.m_z_a is not None and vector.k_cut_rad_per_m is not None:
        out["m_z_a"] = distribution(vector.m_z_a[measured], "A")
        out["k_cut_rad_per_m"] = vector.k_cut_rad_per_m
        out["resolution_m"] = 2.0 * math.pi / vector.k_cut_rad_per_m
    moment = vector.moment
    if moment is not None:
        out["m_z_sigma_a"] = distribution(moment.sigma_a[measured], "A")
        out["m_z_sigma_standoff_a_median"] = _median(moment.sigma_standoff_a[measured])
        out["background_t"] = moment.background_t
        out["background_sigma_t"] = moment.background_sigma_t
        out["round_trip"] = {
            "residual_rms_t": moment.residual_rms_t,
            "residual_rms_z": moment.residual_rms_z,
            "meaning": (
                "B_NV minus the field of the reconstructed m_z, over measured pixels: the "
                "noise and the detail above the cut-off, plus whatever an out-of-plane "
                "sheet at this standoff cannot make; rms_z in units of the field sigma"
            ),
        }
    return out


def calibration_summary(use: CalibrationUse | None) -> dict[str, Any] | None:
    """What the report says of the tip calibration asked for (None: none asked for)."""
    if use is None:
        return None
    record = use.record
    if record is None:
        return {"setting": use.setting, "used": None, "problem": use.problem}
    return {
        "setting": use.setting,
        "used": record.label,
        "path": None if record.path is None else str(record.path),
        "summary": record.summary(),
        "model": record.model,
        "standoff_m": record.standoff_m,
        "standoff_sigma_m": record.standoff_sigma_m,
        "nv_axis_from_calibration": record.nv_axis_fitted,
        "source_store": record.source_store,
        "made_time": record.made_time,
        "chi2_red": record.fit.get("chi2_red"),
        "problem": None,
    }


def alert_summary(events: Sequence[AlertEvent]) -> dict[str, Any]:
    """Counts per state and per rule (raised events), and every event as a dict."""
    raised = [e for e in events if e.state == "raised"]
    return {
        "raised": len(raised),
        "cleared": len(events) - len(raised),
        "raised_by_rule": dict(sorted(Counter(e.rule for e in raised).items())),
        "raised_by_severity": dict(sorted(Counter(e.severity for e in raised).items())),
        "events": [e.to_dict() for e in events],
    }


def _fmt(value: float | None, scale: float, unit: str, digits: int = 4) -> str:
    return "n/a" if value is None else f"{value * scale:.{digits}g} {unit}"


def _bound_value(value_t: float) -> str:
    scale, unit = (1e3, "mT") if abs(value_t) >= 1e-3 else (1e6, "µT")
    return f"{value_t * scale:.3g} {unit}"


def _field_line(stats: Mapping[str, Any] | None) -> str:
    if stats is None:
        return "no field values"
    scale, unit = (1e3, "mT") if max(abs(stats["p5"]), abs(stats["p95"])) >= 1e-3 else (1e6, "µT")
    return (
        f"median {stats['median'] * scale:.4g} {unit}, 5–95 % "
        f"{stats['p5'] * scale:.4g} … {stats['p95'] * scale:.4g} {unit}"
    )


def _standoff_text(report: Mapping[str, Any]) -> str:
    sigma = report.get("standoff_sigma_m") or 0.0
    text = f"{report['standoff_m'] * 1e9:.1f} nm"
    return text + (f" ± {sigma * 1e9:.2g} nm" if sigma > 0 else "")


def report_markdown(report: Mapping[str, Any]) -> str:
    """A short human-readable rendering of a report dict (see :func:`strayline.products`)."""
    axis = report["nv_axis"]
    lines = [
        f"# Scan {report['scan_id']} — products",
        "",
        f"- store: `{report['store']}` ({report['n_lines_planned']} lines planned × "
        f"{report['n_pixels']} pixels)",
        f"- made {report['made_time']} by strayline {report['software_version']}; "
        f"store written by {report['store_software_version']}, config digest "
        f"`{str(report['config_digest'])[:12]}`",
        f"- NV axis θ = {axis['theta_deg']:.2f}°, φ = {axis['phi_deg']:.2f}°; standoff "
        + ("unknown" if report["standoff_m"] is None else _standoff_text(report)),
    ]
    calibration = report.get("calibration")
    if calibration is not None and calibration.get("used"):
        lines.append(f"- tip calibration {calibration['summary']}")
    elif calibration is not None:
        lines.append(
            f"- tip calibration {calibration['setting']!r} not used: {calibration['problem']}"
        )
    lines.append("")
    for direction, trace in report["traces"].items():
        lines += [
            f"## {direction.capitalize()} trace",
            "",
            f"- {trace['lines_committed']} lines committed, {trace['pixels_committed']} pixels; "
            f"fits OK {percent_text(trace['fit_ok_fraction'])}",
        ]
        missing = report.get("missing_lines", {}).get(direction)
        if missing and missing["count"]:
            shown = ", ".join(str(i) for i in missing["first"])
            more = " …" if missing["count"] > len(missing["first"]) else ""
            lines.append(f"- {missing['count']} planned lines missing: {shown}{more}")
        lines += [
            f"- field along NV: {_field_line(trace['field_nv_t'])}",
            f"- PL {_fmt(trace['pl_rate_cps_median'], 1e-3, 'kcounts/s')}, contrast "
            f"{_fmt(trace['contrast_median'], 100, '%', 3)}, linewidth "
            f"{_fmt(trace['fwhm_hz_median'], 1e-6, 'MHz', 3)} (medians)",
        ]
        fractions = trace["fit_status_fractions"]
        if fractions.get("merged", 0.0) > 0:
            bound = trace.get("field_nv_bound_t")
            median = "" if bound is None else f", median bound {_bound_value(bound['median'])}"
            lines.append(
                f"- below resolution (merged dips) {percent_text(fractions['merged'])}: "
                f"|B∥| < bound ({100 * FIELD_BOUND_LEVEL:.0f} %, one-sided){median}"
            )
        failed = {k: v for k, v in fractions.items() if k not in ("ok", "merged") and v > 0}
        if failed:
            listing = ", ".join(
                f"{k.replace('_', ' ')} {percent_text(v)}" for k, v in failed.items()
            )
            lines.append(f"- not OK: {listing}")
        vector = trace.get("vector")
        if vector is not None:
            lines.append(
                f"- vector field: {100 * vector['filled_fraction']:.1f} % of pixels filled; "
                f"Bz {_field_line(vector['bz_t'])}"
            )
            if "m_z_a" in vector and vector["m_z_a"] is not None:
                m = vector["m_z_a"]
                lines.append(
                    f"- sheet moment m_z: 5–95 % {m['p5'] * 1e3:.3g} … {m['p95'] * 1e3:.3g} mA "
                    f"(resolution ≈ {vector['resolution_m'] * 1e9:.0f} nm, mean lost)"
                )
            sigma = vector.get("m_z_sigma_a")
            if sigma is not None:
                trip = vector["round_trip"]
                lines.append(
                    f"- m_z 1σ: median {sigma['median'] * 1e6:.3g} µA (standoff part "
                    f"{(vector['m_z_sigma_standoff_a_median'] or 0.0) * 1e6:.3g} µA); round "
                    f"trip to B_NV: residual rms {_bound_value(trip['residual_rms_t'])}, "
                    f"{trip['residual_rms_z']:.3g} σ"
                )
        lines.append("")
    alerts = report["alerts"]
    lines += ["## Alerts", ""]
    if alerts.get("problem"):
        lines.append(f"- alert log not read: {alerts['problem']}")
    elif alerts["raised"] == 0:
        lines.append("- none raised")
    else:
        by_rule = ", ".join(f"{k} ×{v}" for k, v in alerts["raised_by_rule"].items())
        lines.append(f"- {alerts['raised']} raised, {alerts['cleared']} cleared: {by_rule}")
    lines += ["", "## Products", ""]
    lines += [f"- `{p['path']}` — {p['description']}" for p in report["products"]]
    lines += [f"- skipped {s['product']}: {s['reason']}" for s in report["skipped"]]
    return "\n".join(lines) + "\n"
