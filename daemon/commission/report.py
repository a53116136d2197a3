"""What a commissioning run writes: the report (JSON and text), the profile patch, the
commissioned profile, and plots.

* ``report.json``: every figure with, on the simulated scope, the simulator's true value
  and the error beside it, and whether the simulator targets were met;
* ``profile-patch.toml``: the measured values only, each with a comment saying how it was
  measured, in the profile's own sections and option names;
* ``<profile>.toml``: the profile the run started from with the patch applied (comments
  and layout kept, by tomlkit), which ``phasewatch check`` loads as it is;
* ``registration.png``, ``backlash.png``, ``settle.png``: the map's residuals, the
  backlash samples and focus sweeps, the settling curves (matplotlib).
"""

from __future__ import annotations

import dataclasses
import json
import math
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np
import tomlkit

from daemon.commission.run import CommissionResult
from daemon.commission.settle import TOLERANCE_PX
from drivers import atomic

if TYPE_CHECKING:
    from daemon.profile import Profile
    from drivers.truth import GroundTruth

# Targets on the simulated scope.
PIXEL_SIZE_TARGET = 0.005  # relative
ROTATION_TARGET_DEG = 0.1
BACKLASH_TARGET_UM = 1.0  # or BACKLASH_TARGET_REL of the true backlash, whichever is larger
BACKLASH_TARGET_REL = 0.10
SETTLE_TARGET = 0.20  # relative
SETTLE_MARGIN = 1.25  # the patch's settle_ms: the measured settling time plus a quarter


@dataclasses.dataclass(frozen=True)
class Truth:
    """What the simulator knows of what commissioning measures (None: real hardware)."""

    pixel_size_um: float
    rotation_deg: float
    skew_deg: float
    mirrored: bool
    backlash_um: dict[str, float]
    repeatability_um: float
    settle_ms: float


def truth_of(truth: GroundTruth, tolerance_um: float) -> Truth | None:
    geometry, backlash = truth.camera_geometry(), truth.backlash_um()
    repeat, settle = truth.repeatability_um(), truth.settle_ms(tolerance_um)
    if geometry is None or backlash is None or repeat is None or settle is None:
        return None
    return Truth(
        pixel_size_um=float(geometry["pixel_size_um"]),
        rotation_deg=float(geometry["rotation_deg"]),
        skew_deg=float(geometry["skew_deg"]),
        mirrored=bool(geometry["mirrored"]),
        backlash_um=dict(backlash),
        repeatability_um=float(repeat),
        settle_ms=float(settle),
    )


def _figure(estimate: float, truth: float | None, digits: int = 4) -> dict[str, float]:
    out = {"estimate": round(float(estimate), digits)}
    if truth is not None:
        out["simulator"] = round(float(truth), digits)
        out["error"] = round(float(estimate) - float(truth), digits)
    return out


def settle_tolerance_um(result: CommissionResult) -> float:
    """The settling band in um: a quarter pixel of the measured size."""
    return TOLERANCE_PX * float(result.map_fit.map.parameters()["pixel_size_um"])


def targets(result: CommissionResult, truth: Truth) -> dict[str, dict[str, Any]]:
    """Each simulator target: the error, what is allowed, and whether it was met."""
    params = result.map_fit.map.parameters()
    out: dict[str, dict[str, Any]] = {}

    def put(name: str, error: float, allowed: float, unit: str) -> None:
        out[name] = {"error": round(error, 5), "allowed": round(allowed, 5), "unit": unit, "met": abs(error) <= allowed}

    put("pixel_size", 100 * (float(params["pixel_size_um"]) / truth.pixel_size_um - 1), 100 * PIXEL_SIZE_TARGET, "%")
    put("rotation", float(params["rotation_deg"]) - truth.rotation_deg, ROTATION_TARGET_DEG, "deg")
    estimates = {"x": result.backlash["x"].estimate_um, "y": result.backlash["y"].estimate_um, "z": result.focus_backlash.estimate_um}
    for axis, est in estimates.items():
        true = truth.backlash_um[axis]
        put(f"backlash_{axis}", est - true if math.isfinite(est) else math.inf,
            max(BACKLASH_TARGET_UM, BACKLASH_TARGET_REL * true), "um")
    if truth.settle_ms > 0:
        put("settle_time", 100 * (1000 * result.settle_s / truth.settle_ms - 1), 100 * SETTLE_TARGET, "%")
    else:
        put("settle_time", 1000 * result.settle_s, 1000 * TOLERANCE_PX, "ms")
    return out


def report_dict(result: CommissionResult, profile: Profile, truth: Truth | None) -> dict[str, Any]:
    fit = result.map_fit
    params = fit.map.parameters()
    errors = fit.standard_errors()
    t = truth
    field = result.field_um
    out: dict[str, Any] = {
        "commissioned": True,
        "profile": str(profile.path),
        "truth": "simulator" if t is not None else "none",
        "started": result.started_wall,
        "elapsed_s": round(result.elapsed_s, 2),
        "frames": result.frames,
        "field_um": {"x": round(field.x_um, 2), "y": round(field.y_um, 2), "z": round(field.z_um, 3)},
        "exposure": result.exposure.to_dict(),
        "focus": {
            "z_um": round(result.focus.z_um, 3),
            "simulator_z_um": None if result.focus.true_z_um is None else round(result.focus.true_z_um, 3),
            "frames": result.focus.frames,
        },
        "texture_ratio": round(result.texture_ratio, 2),
        "map": {
            "grid": result.grid,
            "pixel_size_um": _figure(float(params["pixel_size_um"]), t.pixel_size_um if t else None, 6),
            "pixel_x_um": round(float(params["pixel_x_um"]), 6),
            "pixel_y_um": round(float(params["pixel_y_um"]), 6),
            "rotation_deg": _figure(float(params["rotation_deg"]), t.rotation_deg if t else None, 4),
            "skew_deg": _figure(float(params["skew_deg"]), t.skew_deg if t else None, 4),
            "aspect": round(float(params["aspect"]), 6),
            "mirrored": {"estimate": bool(params["mirrored"]), **({"simulator": t.mirrored} if t else {})},
            "standard_errors": {k: round(v, 6) for k, v in errors.items()},
            "px_per_um": [[round(float(v), 8) for v in row] for row in fit.map.px_per_um],
            "rms_residual_px": round(fit.rms_residual_px, 4),
            "grid_points": [
                {"stage_move_um": [round(float(v), 3) for v in mv], "image_shift_px": [round(float(v), 3) for v in sh],
                 "residual_px": [round(float(v), 3) for v in rs], "used": bool(u)}
                for mv, sh, rs, u in zip(fit.stage_moves_um, fit.image_shifts_px, fit.residuals_px, fit.used)
            ],
            "points_used": int(fit.used.sum()),
            "points": int(len(fit.used)),
            "grid_step_um": round(result.grid_step_um, 3),
        },
        "settle": {
            "settle_ms": _figure(1000 * result.settle_s, t.settle_ms if t else None, 2),
            "tolerance_px": TOLERANCE_PX,
            "tolerance_um": round(settle_tolerance_um(result), 5),
            "axes": [s.to_dict(float(params["pixel_size_um"])) for s in result.settle],
        },
        "backlash_um": {
            **{
                axis: {**_figure(b.estimate_um, t.backlash_um[axis] if t else None, 3), **b.to_dict()}
                for axis, b in result.backlash.items()
            },
            "z": {
                **_figure(result.focus_backlash.estimate_um, t.backlash_um["z"] if t else None, 3),
                **result.focus_backlash.to_dict(),
            },
        },
        "repeatability_um": {
            "sd_x": _figure(result.repeatability.sd_um[0], t.repeatability_um if t else None, 4),
            "sd_y": _figure(result.repeatability.sd_um[1], t.repeatability_um if t else None, 4),
            **result.repeatability.to_dict(),
        },
    }
    if t is not None:
        out["targets"] = targets(result, t)
    return out


# -- the profile patch ----------------------------------------------------------------------


@dataclasses.dataclass(frozen=True)
class PatchValue:
    section: str
    key: str
    value: Any
    how: str  # how it was measured (the comment above it)


def patch_values(result: CommissionResult, profile: Profile) -> list[PatchValue]:
    fit = result.map_fit
    p = fit.map.parameters()
    se = fit.standard_errors()
    n = int(fit.used.sum())
    grid = f"a {result.grid} x {result.grid} grid of stage positions {result.grid_step_um:.1f} um apart"
    registered = (
        f"{grid}, each approached from below, registered against the centre by correlation "
        f"(Kuglin & Hines 1975; sub-pixel: Guizar-Sicairos et al. 2008); {n} of {len(fit.used)} frames fitted, "
        f"rms residual {fit.rms_residual_px:.2f} px"
    )
    pixel = float(p["pixel_size_um"])
    magnification = profile.optics.camera_pixel_um / pixel
    settle_ms = 1000 * result.settle_s
    bx, by = result.backlash["x"], result.backlash["y"]
    fz = result.focus_backlash
    sx, sy = result.repeatability.sd_um
    exposure = result.exposure
    values = [
        PatchValue("camera", "exposure_ms", round(exposure.exposure_ms, 2),
                   f"99.9th percentile of the field at {exposure.high_fraction * 100:.0f} % of the range above the dark "
                   f"frame ({exposure.black_dn:.1f} DN), {exposure.saturated_fraction * 100:.3f} % of pixels saturated"),
        PatchValue("optics", "magnification", round(magnification, 5),
                   f"camera_pixel_um / the measured pixel size {pixel:.5f} um (+-{se.get('pixel_size_um', float('nan')):.5f}): "
                   + registered),
        PatchValue("camera_mount", "rotation_deg", round(float(p["rotation_deg"]), 4),
                   f"from the same fit: the image's columns turned {float(p['rotation_deg']):.3f} deg "
                   f"(+-{se.get('rotation_deg', float('nan')):.3f}) from stage +x towards +y"),
        PatchValue("camera_mount", "skew_deg", round(float(p["skew_deg"]), 4),
                   f"from the same fit: the stage axes seen {float(p['skew_deg']):+.3f} deg "
                   f"(+-{se.get('skew_deg', float('nan')):.3f}) from square"),
        PatchValue("camera_mount", "aspect", round(float(p["aspect"]), 5),
                   "from the same fit: image length of a y step over an x step"),
        PatchValue("camera_mount", "mirrored", bool(p["mirrored"]), "from the same fit: the sign of its determinant"),
        PatchValue("camera_mount", "measured", result.started_wall, "when phasewatch commission measured the above"),
        PatchValue("stage", "settle_ms", float(math.ceil(SETTLE_MARGIN * settle_ms)),
                   f"the image stayed within {TOLERANCE_PX} px of where it came to rest {settle_ms:.0f} ms after a "
                   f"{result.settle[0].move_um:g} um move (frames back to back, a damped oscillation fitted), plus "
                   f"{(SETTLE_MARGIN - 1) * 100:.0f} %"),
        PatchValue("stage", "backlash_x_um", round(max(bx.estimate_um, 0.0), 2),
                   f"image shift between arrivals from below and from above, {len(bx.samples_um)} times "
                   f"(sd {bx.sd_um:.2f} um); stopping scatter: sd {sx:.2f} um in x, {sy:.2f} um in y over "
                   f"{len(result.repeatability.positions_um)} returns"),
        PatchValue("stage", "backlash_y_um", round(max(by.estimate_um, 0.0), 2),
                   f"as for x, {len(by.samples_um)} times (sd {by.sd_um:.2f} um)"),
    ]
    if math.isfinite(fz.estimate_um):
        values.append(PatchValue(
            "focus", "backlash_um", round(max(fz.estimate_um, 0.0), 2),
            f"peak of the focus curve swept upwards minus swept downwards ({len(fz.peaks('up'))} + "
            f"{len(fz.peaks('down'))} sweeps, variance of the Laplacian)",
        ))
    return values


def patch_toml(values: list[PatchValue], profile: Profile, started: str) -> str:
    doc = tomlkit.document()
    doc.add(tomlkit.comment(f"Measured by phasewatch commission on {started} for {profile.path}."))
    doc.add(tomlkit.comment("Each value says how it was measured; the figures, their uncertainties and the plots lie beside"))
    doc.add(tomlkit.comment("this file (report.json), with the whole profile with these values applied."))
    tables: dict[str, Any] = {}
    for v in values:
        table = tables.get(v.section)
        if table is None:
            table = tables[v.section] = tomlkit.table()
            doc.add(tomlkit.nl())
            doc.add(v.section, table)
        table.add(tomlkit.comment(v.how))
        table.add(v.key, v.value)
    return tomlkit.dumps(doc)


def patched_profile_text(original_text: str, values: list[PatchValue]) -> str:
    """The profile's text with the measured values set (comments and layout kept)."""
    doc = tomlkit.parse(original_text)
    for v in values:
        if v.section not in doc:
            doc.add(tomlkit.nl())
            doc.add(v.section, tomlkit.table())
        item = tomlkit.item(v.value)
        item.comment("measured by phasewatch commission")
        doc[v.section][v.key] = item  # type: ignore[index]
    return tomlkit.dumps(doc)


# -- the text report ------------------------------------------------------------------------


def _beside(fig: dict[str, float], unit: str, fmt: str) -> str:
    text = f"{fig['estimate']:{fmt}} {unit}"
    if "simulator" in fig:
        text += f"  (simulator: {fig['simulator']:{fmt}} {unit})"
    return text


def text_report(report: dict[str, Any], files: dict[str, str]) -> str:
    m, s, b, r = report["map"], report["settle"], report["backlash_um"], report["repeatability_um"]
    f = report["field_um"]
    tg = report.get("targets", {})

    def mark(name: str) -> str:
        if name not in tg:
            return ""
        t = tg[name]
        return f"   [{'met' if t['met'] else 'MISSED'}: {t['error']:+.3g} {t['unit']}, target {t['allowed']:g} {t['unit']}]"

    mirrored = "yes" if m["mirrored"]["estimate"] else "no"
    if "simulator" in m["mirrored"]:
        mirrored += f"  (simulator: {'yes' if m['mirrored']['simulator'] else 'no'})"
    e = report["exposure"]
    lines = [
        f"commissioned {report['profile']} over x {f['x']:.1f}, y {f['y']:.1f} um, focus {f['z']:.2f} um "
        f"({report['frames']} frames, {report['elapsed_s']:.0f} s)",
        f"  exposure         {e['exposure_ms']:.2f} ms (brightest 0.1 % at {e['p99_9_of_range'] * 100:.0f} % of the range, "
        f"{e['saturated_fraction'] * 100:.3f} % saturated)",
        f"  pixel size       {_beside(m['pixel_size_um'], 'um', '.5f')}{mark('pixel_size')}",
        f"  rotation         {_beside(m['rotation_deg'], 'deg', '.3f')}{mark('rotation')}",
        f"  skew             {_beside(m['skew_deg'], 'deg', '.3f')}",
        f"  aspect           {m['aspect']:.5f}",
        f"  mirrored         {mirrored}",
        f"  map residual     {m['rms_residual_px']:.2f} px rms over {m['points_used']} of {m['points']} grid frames",
        f"  settle time      {_beside(s['settle_ms'], 'ms', '.0f')} to within {s['tolerance_px']} px{mark('settle_time')}",
        f"  backlash x       {_beside(b['x'], 'um', '.2f')}{mark('backlash_x')}",
        f"  backlash y       {_beside(b['y'], 'um', '.2f')}{mark('backlash_y')}",
        f"  backlash z       {_beside(b['z'], 'um', '.2f')}{mark('backlash_z')}" if b["z"]["estimate"] is not None
        else "  backlash z       not measured: a focus sweep showed no peak",
        f"  repeatability    sd {_beside(r['sd_x'], 'um', '.3f')} in x, {_beside(r['sd_y'], 'um', '.3f')} in y",
    ]
    lines.append("  files:")
    lines.extend(f"    {name:<16} {path}" for name, path in files.items())
    return "\n".join(lines)


# -- plots ----------------------------------------------------------------------------------


def write_plots(result: CommissionResult, truth: Truth | None, folder: Path) -> dict[str, Path]:
    """registration.png, backlash.png and settle.png in ``folder``."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    out: dict[str, Path] = {}
    fit = result.map_fit
    fig, (left, right) = plt.subplots(1, 2, figsize=(11, 5))
    s, r = fit.stage_moves_um, fit.residuals_px
    # Residuals drawn a quarter of the grid step long at their largest.
    scale = 0.25 * result.grid_step_um / max(float(np.abs(r[fit.used]).max()), 1e-6)
    left.quiver(s[:, 0], s[:, 1], r[:, 0] * scale, r[:, 1] * scale, angles="xy", scale_units="xy", scale=1, color="C0")
    left.plot(s[~fit.used, 0], s[~fit.used, 1], "rx", label="left out")
    left.set(title=f"registration residuals (arrows x{scale:.0f})", xlabel="stage x move (um)", ylabel="stage y move (um)")
    left.set_aspect("equal")
    right.plot(r[fit.used, 0], r[fit.used, 1], "o", ms=4)
    reach = 1.2 * max(float(np.abs(r[fit.used]).max()), 0.1)
    right.set_xlim(-reach, reach)
    right.set_ylim(-reach, reach)
    if (~fit.used).any():
        left.legend(fontsize=8)
    right.axhline(0, color="0.7")
    right.axvline(0, color="0.7")
    left_out = f", {int((~fit.used).sum())} left out" if (~fit.used).any() else ""
    right.set(title=f"residuals: {fit.rms_residual_px:.2f} px rms{left_out}", xlabel="column (px)", ylabel="row (px)")
    right.set_aspect("equal")
    fig.tight_layout()
    out["registration"] = folder / "registration.png"
    with atomic.open_atomic(out["registration"]) as fh:
        fig.savefig(fh, format="png", dpi=100)
    plt.close(fig)

    fig, axes = plt.subplots(1, 3, figsize=(14, 4.5))
    for ax, axis in zip(axes[:2], ("x", "y")):
        bl = result.backlash[axis]
        ax.plot(range(1, len(bl.samples_um) + 1), bl.samples_um, "o", label="from above minus from below")
        ax.axhline(bl.estimate_um, color="C0", label=f"mean {bl.estimate_um:.2f} um")
        if truth is not None:
            ax.axhline(truth.backlash_um[axis], color="C3", ls="--", label=f"simulator {truth.backlash_um[axis]:.2f} um")
        ax.set(title=f"backlash {axis}", xlabel="cycle", ylabel="um", xticks=range(1, len(bl.samples_um) + 1))
        ax.legend(fontsize=8)
    ax = axes[2]
    for k, sweep in enumerate(result.focus_backlash.sweeps):
        colour = "C0" if sweep.direction == "up" else "C1"
        ax.plot(sweep.z_um, sweep.scores, ".-", color=colour, alpha=0.7, label=sweep.direction if k < 2 else None)
        if sweep.peak_z_um is not None:
            ax.axvline(sweep.peak_z_um, color=colour, lw=0.8)
    est = result.focus_backlash.estimate_um
    title = f"focus sweeps: backlash {est:.2f} um" if math.isfinite(est) else "focus sweeps"
    if truth is not None:
        title += f" (simulator {truth.backlash_um['z']:.2f})"
    ax.set(title=title, xlabel="focus motor position (um)", ylabel="focus score")
    ax.legend(fontsize=8)
    fig.tight_layout()
    out["backlash"] = folder / "backlash.png"
    with atomic.open_atomic(out["backlash"]) as fh:
        fig.savefig(fh, format="png", dpi=100)
    plt.close(fig)

    fig, axes = plt.subplots(1, len(result.settle), figsize=(6 * len(result.settle), 4.5), squeeze=False)
    for ax, st in zip(axes[0], result.settle):
        t_ms = 1000 * st.t_s
        ax.plot(t_ms, st.along_px, "o", ms=3, label="frames")
        if st.fit is not None:
            tt = np.linspace(0, st.t_s.max(), 800)
            ax.plot(1000 * tt, st.fit(tt), "-", lw=1, label=f"fit: {st.fit.frequency_hz:.1f} Hz, {1000 * st.fit.decay_s:.0f} ms")
        ax.axhspan(-TOLERANCE_PX, TOLERANCE_PX, color="0.85", label=f"+-{TOLERANCE_PX} px")
        ax.axvline(1000 * st.settle_s, color="C2", label=f"settled {1000 * st.settle_s:.0f} ms")
        if truth is not None:
            ax.axvline(truth.settle_ms, color="C3", ls="--", label=f"simulator {truth.settle_ms:.0f} ms")
        ax.set(title=f"settling after a {st.move_um:g} um move along {st.axis}", xlabel="ms after the move ended",
               ylabel="image displacement (px)")
        ax.legend(fontsize=8)
    fig.tight_layout()
    out["settle"] = folder / "settle.png"
    with atomic.open_atomic(out["settle"]) as fh:
        fig.savefig(fh, format="png", dpi=100)
    plt.close(fig)
    return out


def write_results(result: CommissionResult, profile: Profile, truth: Truth | None, folder: Path) -> dict[str, Any]:
    """Write everything into ``folder`` (made if missing); returns the report, its ``files`` filled in."""
    report = report_dict(result, profile, truth)
    folder.mkdir(parents=True, exist_ok=True)
    values = patch_values(result, profile)
    files = {
        "report": folder / "report.json",
        "profile patch": folder / "profile-patch.toml",
        "profile": folder / profile.path.name,
    }
    atomic.write_text(files["profile patch"], patch_toml(values, profile, result.started_wall), encoding="utf-8")
    atomic.write_text(files["profile"], patched_profile_text(profile.path.read_text(encoding="utf-8"), values), encoding="utf-8")
    files.update({f"{name} plot": path for name, path in write_plots(result, truth, folder).items()})
    report["files"] = {name: str(path) for name, path in files.items()}
    atomic.write_text(files["report"], json.dumps(report, indent=2) + "\n", encoding="utf-8")
    return report
