"""The per-well read model: which sites count, and the culture watch, plots, CSV export
and API all reading the same figures off one index."""

from __future__ import annotations

import csv
import statistics
from pathlib import Path

import numpy as np
import pytest

from daemon.culture.alerts import CONFLUENCE_DROP, CONFLUENCE_REACHED, FOCUS_FAILING, CultureWatch, WatchRules
from daemon.culture.readings import (
    WellReading,
    growth_fits,
    plot_series,
    site_readings,
    timelapse_readings,
    well_readings,
)
from daemon.storage.export import export_csv
from daemon.storage.frames import FrameStore
from daemon.storage.index import Index, open_index
from daemon.storage.ome import FrameMeta
from daemon.timelapse.plan import Plan, ZStack
from tests.helpers import sim_profile

T0_S = 1.77e9
INTERVAL_S = 6 * 3600.0
PIXEL_UM = sim_profile().optics.pixel_size_um


def _record(index: Index, wells: dict[str, int], *, count: int, z_stack: ZStack | None = None,
            save: str = "raw") -> int:
    """A time-lapse row as the scheduler records one: the plan and its positions."""
    plan = Plan(
        name="LR-0412 KVL-7 readings", vessel="96-well", wells=list(wells), sites_per_well=max(wells.values()),
        interval_s=INTERVAL_S, count=count, autofocus="track", z_stack=z_stack, exposure_ms=20.0, gain_db=0.0,
        correction=save != "raw", save=save,
    )
    positions = [
        {"key": f"{w}-{s}", "well": w, "site": s, "x_um": 1000.0 * s, "y_um": 2000.0}
        for w, n in wells.items() for s in range(1, n + 1)
    ]
    tl = index.create_timelapse(
        name=plan.name, plan={"plan": plan.to_dict(), "positions": positions}, profile_path="hw_profiles/sim.toml",
        profile_name="sim", created_s=T0_S, t0_s=T0_S, interval_s=INTERVAL_S, count=count,
        n_positions=len(positions), reserve_mb=0.0,
    )
    return tl


def _save(store: FrameStore, tl: int, *, tp: int, key: str, confluence: float | None, focus_found: bool | None,
          z_index: int = 0, kind: str = "raw", focus_score: float = 40.0) -> int:
    well, site = key.split("-")
    t_s = T0_S + tp * INTERVAL_S + 30.0 * int(site)
    meta = FrameMeta(
        timelapse_id=tl, timelapse_name="LR-0412 KVL-7 readings", tp=tp, key=key, well=well, site=int(site),
        z_index=z_index, kind=kind, t_s=t_s, delta_t_s=t_s - T0_S, x_um=1000.0, y_um=2000.0,
        z_um=1500.0 + 4.0 * z_index, exposure_ms=20.0, gain_db=0.0, bit_depth=8, pixel_size_um=PIXEL_UM,
        focus_score=focus_score, confluence=confluence, focus_found=focus_found, objective="10x/0.25 Ph1",
    )
    pixels = np.random.default_rng(tp * 100 + int(site) * 10 + z_index).integers(0, 256, (48, 64)).astype(np.uint8)
    return store.save(pixels, meta).frame_id


@pytest.fixture
def store(tmp_path: Path) -> FrameStore:
    index = open_index(tmp_path)
    yield FrameStore(tmp_path, index)
    index.close()


def test_sites_whose_focus_failed_are_left_out_and_the_well_says_why(store: FrameStore) -> None:
    tl = _record(store.index, {"B3": 3, "C4": 2, "D5": 1, "E6": 2}, count=1)
    _save(store, tl, tp=0, key="B3-1", confluence=0.40, focus_found=True)
    _save(store, tl, tp=0, key="B3-2", confluence=0.05, focus_found=False)  # blurred: reads low
    _save(store, tl, tp=0, key="B3-3", confluence=0.50, focus_found=None)  # plane not searched
    _save(store, tl, tp=0, key="C4-1", confluence=0.08, focus_found=False)
    _save(store, tl, tp=0, key="C4-2", confluence=0.06, focus_found=False)
    _save(store, tl, tp=0, key="D5-1", confluence=0.30, focus_found=None)
    _save(store, tl, tp=0, key="E6-1", confluence=None, focus_found=True)  # not analysed (yet)
    missing = _save(store, tl, tp=0, key="E6-2", confluence=0.9, focus_found=True)
    store.index.set_frame_status(missing, "missing")  # its file is gone: no reading from it

    got = {r.well: r for r in timelapse_readings(store.index, tl)}
    b3 = got["B3"]
    assert b3.confluence == pytest.approx(statistics.fmean([0.40, 0.50]))
    assert (b3.sites_used, b3.sites_imaged, b3.sites_total, b3.focus) == (2, 3, 3, "found")
    assert [s.used for s in b3.sites] == [True, False, True]
    assert b3.t_s == T0_S + 30.0 and b3.elapsed_s == 30.0  # the well's first site
    c4 = got["C4"]
    assert (c4.confluence, c4.sites_used, c4.sites_total, c4.focus) == (None, 0, 2, "failed")
    assert c4.informative  # the watch must still hear that focus failed here
    d5 = got["D5"]
    assert (d5.confluence, d5.focus) == (0.30, "not_searched")
    e6 = got["E6"]
    assert (e6.confluence, e6.sites_used, e6.sites_imaged, e6.sites_total) == (None, 0, 1, 2)
    assert well_readings(store.index, tl, "B3") == [b3]
    assert all(isinstance(r, WellReading) for r in got.values())


def test_the_analysed_plane_is_read_and_the_corrected_frame_before_raw(store: FrameStore) -> None:
    tl = _record(store.index, {"B3": 1}, count=1, z_stack=ZStack(3, 4.0), save="both")
    ids = {}
    for z in range(3):
        for kind in ("raw", "corrected"):
            # Only the analysed plane (the middle one) carries confluence, as the scheduler stores it.
            ids[(z, kind)] = _save(
                store, tl, tp=0, key="B3-1", confluence=0.42 if z == 1 else None, focus_found=True, z_index=z,
                kind=kind, focus_score=10.0 * z + (1.0 if kind == "corrected" else 0.0),
            )
    (reading,) = timelapse_readings(store.index, tl)
    (site,) = reading.sites
    assert site.frame_id == ids[(1, "corrected")]
    assert (site.z_um, site.focus_score, site.confluence) == (1504.0, 11.0, 0.42)

    # Before the analysis has run, the analysed plane is still the one read, not the stack's first.
    tl2 = _record(store.index, {"B3": 1}, count=1, z_stack=ZStack(3, 4.0))
    for z in range(3):
        _save(store, tl2, tp=0, key="B3-1", confluence=None, focus_found=True, z_index=z)
    assert site_readings(store.index.frames(tl2), analysis_plane=1)[0].z_um == 1504.0
    assert timelapse_readings(store.index, tl2)[0].sites[0].z_um == 1504.0


# Site B3-1 of a growing culture; B3-2 the same a little denser, but out of focus at time point 3.
B3_SITE1 = [0.30, 0.36, 0.43, 0.50, 0.57, 0.63]
BLUR_TP = 3
C4_FOCUS_LOST = (2, 3, 4)


def _growing_plate(store: FrameStore) -> int:
    tl = _record(store.index, {"B3": 2, "C4": 2}, count=len(B3_SITE1))
    for tp, c in enumerate(B3_SITE1):
        _save(store, tl, tp=tp, key="B3-1", confluence=c, focus_found=True)
        blurred = tp == BLUR_TP
        _save(store, tl, tp=tp, key="B3-2", confluence=0.02 if blurred else c + 0.02, focus_found=not blurred)
        for site in (1, 2):
            lost = tp in C4_FOCUS_LOST
            _save(store, tl, tp=tp, key=f"C4-{site}", confluence=0.03 if lost else 0.2 + 0.01 * tp,
                  focus_found=not lost)
    store.index.set_state(tl, "completed", finished_s=T0_S + len(B3_SITE1) * INTERVAL_S)
    return tl


def _watch() -> CultureWatch:
    watch = CultureWatch()
    watch.set_rules("B3", WatchRules(confluence_threshold=0.55))
    return watch


def _watch_alerts(index: Index, tl: int) -> list:
    """The culture watch fed time point by time point, as the scheduler feeds it."""
    watch = _watch()
    alerts = []
    for tp in range(len(B3_SITE1)):
        alerts += watch.feed(timelapse_readings(index, tl, tp=tp))
    return alerts


def test_watch_plots_and_export_agree_on_one_index(store: FrameStore, tmp_path: Path) -> None:
    tl = _growing_plate(store)
    readings = timelapse_readings(store.index, tl)
    b3 = [r for r in readings if r.well == "B3"]
    c4 = [r for r in readings if r.well == "C4"]
    assert b3[BLUR_TP].confluence == B3_SITE1[BLUR_TP] and b3[BLUR_TP].sites_used == 1
    assert [r.focus for r in c4] == ["failed" if tp in C4_FOCUS_LOST else "found" for tp in range(len(B3_SITE1))]

    # The culture watch: the blurred site does not read as detachment; the threshold alert
    # carries the well's reading; focus failing three time points running is reported.
    alerts = _watch_alerts(store.index, tl)
    kinds = [(a.kind, a.well) for a in alerts]
    assert (CONFLUENCE_DROP, "B3") not in kinds
    reached = next(a for a in alerts if a.kind == CONFLUENCE_REACHED)
    hit = next(r for r in b3 if r.t_s == reached.t_s)
    assert reached.value == hit.confluence
    assert [a.t_s for a in alerts if a.kind == FOCUS_FAILING] == [c4[C4_FOCUS_LOST[-1]].t_s]
    # The test can fail: averaging every site, blurred one included, would have read as a drop.
    naive = CultureWatch()
    naive_alerts = []
    for tp, c in enumerate(B3_SITE1):
        other = 0.02 if tp == BLUR_TP else c + 0.02
        naive_alerts += naive.update("B3", T0_S + tp * INTERVAL_S, statistics.fmean([c, other]), True)
    assert CONFLUENCE_DROP in [a.kind for a in naive_alerts]

    # The plots (what GET .../series serves): the same points per well.
    series = plot_series(store.index, tl)
    for well, rows in (("B3", b3), ("C4", c4)):
        valued = [r for r in rows if r.confluence is not None]
        assert series["wells"][well]["confluence"] == [r.confluence for r in valued]
        assert series["wells"][well]["tp"] == [r.tp for r in valued]
        assert series["wells"][well]["sites_used"] == [r.sites_used for r in valued]
    assert series["positions"]["B3-2"]["used"][BLUR_TP] is False
    fits = growth_fits(readings)
    assert series["wells"]["B3"]["growth"] == fits["B3"].to_dict()

    # The CSV export: wells.csv row for row, growth.csv from the same fits.
    out = tmp_path / "export"
    export_csv(store.index, tl, out)
    with open(out / "wells.csv", newline="") as fh:
        rows = list(csv.DictReader(fh))
    assert [(int(r["time_point"]), r["well"]) for r in rows] == [(r.tp, r.well) for r in readings]
    for row, r in zip(rows, readings, strict=True):
        assert row["confluence"] == ("" if r.confluence is None else f"{r.confluence:.4f}")
        assert (int(row["sites_used"]), int(row["sites_total"]), row["focus"]) == (r.sites_used, r.sites_total, r.focus)
        assert float(row["elapsed_h"]) == pytest.approx(r.elapsed_h, abs=1e-4)
    with open(out / "growth.csv", newline="") as fh:
        growth = {g["well"]: g for g in csv.DictReader(fh)}
    assert int(growth["B3"]["n_points"]) == fits["B3"].n_points == len(B3_SITE1)
    assert growth["B3"]["doubling_time_h"] == f"{fits['B3'].doubling_time_h:.3f}"
    assert int(growth["C4"]["n_points"]) == len(B3_SITE1) - len(C4_FOCUS_LOST)


@pytest.mark.timeout(120)
async def test_the_api_serves_the_same_readings(store: FrameStore, tmp_path: Path) -> None:
    from tests.web_support import served

    tl = _growing_plate(store)
    readings = timelapse_readings(store.index, tl)
    async with served(store.data_dir) as srv:
        async with srv.session.get(srv.u(f"/api/v1/timelapses/{tl}/series"), headers=srv.auth) as r:
            assert r.status == 200
            series = await r.json()
        async with srv.session.post(srv.u(f"/api/v1/timelapses/{tl}/exports"), headers=srv.auth) as r:
            assert r.status in (200, 201), await r.text()
            made = await r.json()
        link = next(f["download"] for f in made["files"] if f["name"] == "wells.csv")
        async with srv.session.get(srv.u(link), headers=srv.auth) as r:
            wells_csv = await r.text()
    for well in ("B3", "C4"):
        valued = [r for r in readings if r.well == well and r.confluence is not None]
        assert series["wells"][well]["confluence"] == pytest.approx([r.confluence for r in valued], abs=0)
        assert series["wells"][well]["t_h"] == [round(r.elapsed_h, 5) for r in valued]
    rows = list(csv.DictReader(wells_csv.splitlines()))
    assert [row["confluence"] for row in rows] == ["" if r.confluence is None else f"{r.confluence:.4f}" for r in readings]


@pytest.mark.timeout(120)
async def test_the_well_readings_route_serves_the_read_model(store: FrameStore, tmp_path: Path) -> None:
    from tests.web_support import served

    tl = _growing_plate(store)
    async with served(store.data_dir) as srv:
        async with srv.session.get(srv.u(f"/api/v1/timelapses/{tl}/wells/c04/readings"), headers=srv.auth) as r:
            assert r.status == 200, await r.text()
            body = await r.json()
        async with srv.session.get(srv.u(f"/api/v1/timelapses/{tl}/wells/H12/readings"), headers=srv.auth) as r:
            assert r.status == 404
            assert "not in time-lapse" in (await r.json())["error"]["message"]
        async with srv.session.get(srv.u(f"/api/v1/timelapses/{tl}/wells/9Z/readings"), headers=srv.auth) as r:
            assert r.status == 400
        async with srv.session.get(srv.u(f"/api/v1/timelapses/{tl + 99}/wells/C4/readings"), headers=srv.auth) as r:
            assert r.status == 404
    expected = well_readings(store.index, tl, "C4")
    assert body["well"] == "C4" and len(body["readings"]) == len(expected) == len(B3_SITE1)
    for got, want in zip(body["readings"], expected, strict=True):
        assert (got["tp"], got["t_s"], got["sites_used"], got["sites_total"], got["focus"]) == (
            want.tp, want.t_s, want.sites_used, want.sites_total, want.focus.value)
        assert got["confluence"] == want.confluence
    # C4 lost focus at some time points: those readings say so and use fewer sites.
    lost = [g for g in body["readings"] if g["tp"] in C4_FOCUS_LOST]
    assert lost and all(g["sites_used"] < g["sites_imaged"] or g["confluence"] is None for g in lost)


async def test_a_simulated_time_lapse_alerts_on_what_its_readings_show(tmp_path: Path) -> None:
    """The scheduler's own watch, on the simulated plate: its empty well H12 never comes
    into focus, and the alert the scheduler raised matches the readings of the index."""
    from tests.test_scheduler import make_plan, run_new

    plan = make_plan(wells=["B2", "H12"], count=3, autofocus="track", interval_s=6 * 3600.0)
    scheduler, _driver, state = await run_new(tmp_path, plan)
    assert state == "completed"
    readings = timelapse_readings(scheduler.index, scheduler.id)
    h12 = [r for r in readings if r.well == "H12"]
    b2 = [r for r in readings if r.well == "B2"]
    assert [r.focus for r in h12] == ["failed"] * 3 and all(r.confluence is None for r in h12)
    assert all(r.focus == "found" and r.confluence is not None for r in b2)
    frames = {(f["tp"], f["key"]): f for f in scheduler.index.frames(scheduler.id)}
    assert [r.confluence for r in b2] == [frames[(tp, "B2-1")]["confluence"] for tp in range(3)]
    failing = [a for a in scheduler.index.alerts(scheduler.id) if a["kind"] == FOCUS_FAILING]
    # Raised once, when the third failed reading came in (the alert row carries the clock of that moment).
    assert len(failing) == 1 and "H12" in failing[0]["message"] and failing[0]["t_s"] >= h12[-1].t_s
    assert set(plot_series(scheduler.index, scheduler.id)["wells"]) == {"B2"}
