"""phasewatch's EMVA 1288 analysis against the EMVA 1288 reference implementation.

Source of every expected value here: the ``emva1288`` package (the EMVA 1288 working
group's reference implementation, 1.0.x for Release 4.0). Its camera simulator writes
the photon-transfer frames, its own processing computes the results, and phasewatch
analyses the same files (see tests/emva1288_reference.py). Required agreement: 1 %.

Two differences of definition, both explained where they are checked:
- sensitivity threshold: the reference computes μ_e.min = σ_y.dark/K + ½ (the form of
  Release 3.1); phasewatch solves SNR = 1 exactly, ½ + √(¼ + σ²_y.dark/K²) (the form of
  Release 4.0 Linear, from memory). The two differ by about 1 % at σ_y.dark/K ≈ 3 e⁻.
- saturation point: the standard takes the maximum of the temporal variance. The
  reference looks for it by scanning back from the last step and stopping at the first two
  falls in a row; on a sensor whose full well clips before the converter, the variance
  past saturation is flat and noisy and the scan can stop right at the end.
"""

from __future__ import annotations

import dataclasses
import json
import math
import re
from collections.abc import Callable
from pathlib import Path

import numpy as np
import pytest
import tifffile

from daemon.cli import main
from daemon.illumination.characterize import (
    PRNU_TOTAL,
    Characterization,
    PtcPoint,
    SpatialStacks,
    analyse,
    pair_mean_variance,
)
from daemon.illumination.stats import RunningStats
from tests.emva1288_reference import (
    FULL_WELL_E,
    STACK_FRAMES,
    Camera,
    Series,
    make_series,
    reference_results,
    write_manifest,
)

CAMERAS = {
    # The converter clips before the full well (0.5 DN/e⁻ × 15000 e⁻ > 4095 DN).
    "12-bit": Camera(bit_depth=12, gain_dn_per_e=0.5, black_offset_dn=30, steps=60),
    # The dark noise is just resolved: σ²_y.dark ≈ 0.27 DN², above the 0.24 DN² floor.
    "8-bit": Camera(bit_depth=8, gain_dn_per_e=0.1, black_offset_dn=4, steps=50),
}
#: The full well clips first (0.233 DN/e⁻ × 15000 e⁻ < 4095 DN); fine steps past it.
FULL_WELL_FIRST = Camera(bit_depth=12, gain_dn_per_e=0.25, black_offset_dn=30, steps=100)


@pytest.fixture(scope="module")
def made(tmp_path_factory: pytest.TempPathFactory) -> Callable[[str], Series]:
    """Each camera's series, made once for the module."""
    cache: dict[str, Series] = {}

    def get(name: str) -> Series:
        if name not in cache:
            cache[name] = make_series(tmp_path_factory.mktemp(f"emva1288-{name}"), CAMERAS[name])
        return cache[name]

    return get


@pytest.fixture(params=sorted(CAMERAS))
def series(request: pytest.FixtureRequest, made: Callable[[str], Series]) -> Series:
    return made(request.param)


def analyse_reference_files(series: Series) -> Characterization:
    """phasewatch's analysis of the frames that emva1288 wrote, grouped as its descriptor
    groups them: a lit and a dark pair per exposure (ns there, ms here) and the stacks."""
    points = []
    for exposure_ns, by_photons in sorted(series.images["temporal"].items()):
        (lit_photons,) = [p for p in by_photons if p != 0.0]
        la, lb = (tifffile.imread(f) for f in by_photons[lit_photons])
        da, db = (tifffile.imread(f) for f in by_photons[0.0])
        points.append(PtcPoint(exposure_ns / 1e6, *pair_mean_variance(la, lb), *pair_mean_variance(da, db), 0.0))
    ((exposure_ns, by_photons),) = series.images["spatial"].items()
    (lit_photons,) = [p for p in by_photons if p != 0.0]

    def stack(files: list[str]) -> tuple[np.ndarray, np.ndarray]:
        stats = RunningStats(tifffile.imread(files[0]).shape)
        for f in files:
            stats.add(tifffile.imread(f).astype(np.float64))
        return stats.mean, stats.variance

    lit, lit_var = stack(by_photons[lit_photons])
    dark, dark_var = stack(by_photons[0.0])
    stacks = SpatialStacks(exposure_ns / 1e6, STACK_FRAMES, lit, lit_var, dark, dark_var)
    return analyse(points, stacks)


def agreement(result: Characterization, reference: dict[str, float]) -> dict[str, tuple[float, float]]:
    """(phasewatch, emva1288) per quantity, named as in the reference."""
    return {
        "K": (result.system_gain_dn_per_e, reference["K"]),
        "sigma_y_dark": (result.dark_noise_dn, reference["sigma_y_dark"]),
        "sigma_d": (result.read_noise_e, reference["sigma_d"]),
        "DSNU1288": (result.dsnu_e, reference["DSNU1288"]),
        "PRNU1288": (result.prnu_fraction, reference["PRNU1288"]),
        # Dark current from the slope of the dark mean (emva1288's u_I_mean).
        "u_I_mean": (result.dark_current_e_per_s, reference["u_I_mean"]),
        "u_e_sat": (result.saturation_capacity_e, reference["u_e_sat"]),
    }


def assert_within_1_percent(result: Characterization, reference: dict[str, float]) -> None:
    off = {k: ours / ref - 1.0 for k, (ours, ref) in agreement(result, reference).items()}
    assert all(abs(v) < 0.01 for v in off.values()), {k: f"{100 * v:+.3f} %" for k, v in off.items()}


def assert_threshold_is_the_exact_form_of_the_reference(result: Characterization, reference: dict[str, float]) -> None:
    # emva1288: μ_e.min = σ_y.dark/K + ½, so σ_y.dark/K = μ_e.min − ½; phasewatch's exact
    # root of SNR = 1 from the same ratio is ½ + √(¼ + (σ_y.dark/K)²) (Release 4.0, from memory).
    ratio = reference["u_e_min"] - 0.5
    assert result.sensitivity_threshold_e == pytest.approx(0.5 + math.sqrt(0.25 + ratio**2), rel=0.01)
    assert result.dynamic_range == pytest.approx(result.saturation_capacity_e / result.sensitivity_threshold_e)


def test_analysis_of_the_reference_frames_agrees_with_the_reference(series: Series) -> None:
    result = analyse_reference_files(series)
    assert result.dark_resolved
    # emva1288's frames are evenly lit: PRNU by the standard's own formula, every part of
    # the pattern (the simulated one has row and column components) counted.
    assert result.prnu_method == PRNU_TOTAL and result.field_nonuniformity < 0.06
    assert result.saturation_index == series.reference["index_u_ysat"]
    assert result.fit_last == series.reference["index_sensitivity_max"]
    assert_within_1_percent(result, series.reference)
    assert_threshold_is_the_exact_form_of_the_reference(result, series.reference)
    # The simulator's own gain, as a sanity check of the series (not of the analysis).
    assert result.system_gain_dn_per_e == pytest.approx(series.set_gain_dn_per_e, rel=0.03)


def test_saturation_at_the_variance_maximum_when_the_full_well_clips_first(tmp_path: Path) -> None:
    series = make_series(tmp_path, FULL_WELL_FIRST)
    result = analyse_reference_files(series)
    s2_y = np.asarray(series.data["temporal"]["s2_y"])
    peak = int(np.argmax(s2_y))
    # The last steps are past the full well for every pixel: only the quantisation noise
    # is left, much the same at each of them.
    assert s2_y[-10:].max() < 0.01 * s2_y[peak]
    assert result.saturation_index == peak
    # A pixel cannot hold more than its full well.
    assert result.saturation_capacity_e <= FULL_WELL_E
    # The reference asked for the saturation point at the variance maximum, the standard's
    # definition (its own index_u_ysat argument), gives the same results. Its default scan
    # stops later (here at the last step, giving 17.5 ke⁻, above the full well).
    assert series.reference["index_u_ysat"] >= peak
    at_peak = reference_results(series.data, index_u_ysat=peak)
    assert_within_1_percent(result, at_peak)


# -- phasewatch characterize --frames MANIFEST.csv on the reference's frames -----------------


def run_cli(capsys: pytest.CaptureFixture[str], *args: str) -> tuple[int, str, str]:
    rc = main(["characterize", *args])
    out, err = capsys.readouterr()
    return rc, out, err


def cli_report(capsys: pytest.CaptureFixture[str], manifest: Path, out: Path, *extra: str) -> dict:
    rc, stdout, err = run_cli(capsys, "--frames", str(manifest), "--out", str(out), "--json", *extra)
    assert rc == 0, err
    assert "characterize: 100 %" in err  # progress on stderr, the report alone on stdout
    return json.loads(stdout)


def result_of(report: dict) -> Characterization:
    return Characterization(**{k: v for k, v in report["results"].items() if k not in ("dynamic_range_db", "snr_max_db")})


def test_characterize_frames_agrees_with_the_reference(series: Series, tmp_path: Path, capsys) -> None:
    manifest = write_manifest(series, series.folder / "manifest.csv")
    report = cli_report(capsys, manifest, tmp_path / "out")
    result = result_of(report)
    assert_within_1_percent(result, series.reference)
    assert_threshold_is_the_exact_form_of_the_reference(result, series.reference)
    assert result.saturation_index == series.reference["index_u_ysat"]
    # 12-bit values in 16-bit files: the bit depth comes from the largest value.
    assert report["bit_depth"] == series.camera.bit_depth and report["high_bits_shift"] == 0
    assert report["frames"] == 4 * series.camera.steps + 2 * STACK_FRAMES
    assert report["measuring_area_px"] > 0.99 * 192 * 256  # an even field: nearly all of it
    saved = json.loads((tmp_path / "out" / "characterization.json").read_text())
    assert saved["results"] == report["results"] and len(saved["points"]) == series.camera.steps
    png = (tmp_path / "out" / "photon-transfer.png").read_bytes()
    assert png[:8] == b"\x89PNG\r\n\x1a\n" and len(png) > 20000


def test_frames_stored_otherwise_give_the_same_results(made: Callable[[str], Series], tmp_path: Path, capsys) -> None:
    """The 12-bit series as 16-bit PNGs with the values in the high bits (×16, as some
    cameras store 12-bit data), and the two stacks as multi-page TIFFs."""
    import imageio.v3 as iio

    series = made("12-bit")
    plain = analyse_reference_files(series)
    lines = ["exposure_ms,kind,path"]
    for exposure_ns, by_photons in sorted(series.images["temporal"].items()):
        for photons, files in by_photons.items():
            for f in files:
                name = f"{Path(f).stem}.png"
                iio.imwrite(tmp_path / name, tifffile.imread(f) << 4, compress_level=0)
                lines.append(f"{exposure_ns / 1e6!r},{'dark' if photons == 0.0 else 'lit'},{name}")
    ((exposure_ns, by_photons),) = series.images["spatial"].items()
    for photons, files in by_photons.items():
        kind = "spatial_dark" if photons == 0.0 else "spatial_lit"
        tifffile.imwrite(tmp_path / f"{kind}.tif", np.stack([tifffile.imread(f) << 4 for f in files]))
        lines.append(f"{exposure_ns / 1e6!r},{kind},{kind}.tif")
    manifest = tmp_path / "shifted.csv"
    manifest.write_text("\n".join(lines) + "\n")
    rc, text, err = run_cli(capsys, "--frames", str(manifest), "--out", str(tmp_path / "shifted"))
    assert rc == 0, err
    report = json.loads((tmp_path / "shifted" / "characterization.json").read_text())
    assert report["bit_depth"] == 12 and report["high_bits_shift"] == 4
    assert report["spatial_stacks"]["frames"] == STACK_FRAMES
    assert report["measuring_area_px"] == 192 * 256  # as in the analysis without a manifest
    for key, value in dataclasses.asdict(plain).items():
        assert getattr(result_of(report), key) == (pytest.approx(value, rel=1e-9) if isinstance(value, float) else value)
    # The text report: the quantities, the PRNU method, what was done to the values.
    assert re.search(rf"system gain K +{plain.system_gain_dn_per_e:.4g} DN/e-", text)
    assert "PRNU: EMVA 1288 total (uniform field)" in text and "photon-transfer.png" in text
    assert "stored in the high bits (all multiples of 16): divided by 16" in text


def test_bit_depth_given_on_the_command_line(made: Callable[[str], Series], tmp_path: Path, capsys) -> None:
    series = made("12-bit")
    manifest = write_manifest(series, series.folder / "manifest-bits.csv")
    given = cli_report(capsys, manifest, tmp_path / "given", "--bit-depth", "14")
    assert given["bit_depth"] == 14 and given["bit_depth_from"] == "--bit-depth"
    # The full scale only marks the plot and counts clipped pixels: the results stand.
    assert_within_1_percent(result_of(given), series.reference)
    # The series reaches 4095: more than 10 bits hold.
    rc, _, err = run_cli(capsys, "--frames", str(manifest), "--out", str(tmp_path / "ten"), "--bit-depth", "10")
    assert rc == 2 and "values reach 4095, more than 10 bits hold (full scale 1023); check --bit-depth" in err
