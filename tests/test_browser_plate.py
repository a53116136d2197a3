"""The vessel map, a plan in a biologist's units with conditions, and the position viewer,
in real headless Chromium (Debian's package) against the daemon on loopback.

A technician clicks a well on the drawn plate and the simulated stage goes there; drags and
shift/ctrl-clicks wells into a plan; types "2 h" and "4 h" and sees the time points counted;
labels two conditions; runs the plan; scrubs a position's frames in the viewer and downloads
its movie, which is decoded here (imageio with its ffmpeg) to check it holds one frame per
time point. The same page at a 390 x 844 phone viewport puts the time-lapse status and the
alerts first and keeps every field inside the screen. Screenshots go to /tmp/screens/ and
test-artifacts/.
"""

from __future__ import annotations

import asyncio
import csv
import io
import json
from pathlib import Path

import aiohttp
import imageio.v2 as imageio
import pytest
import tifffile

import daemon.storage.movie  # noqa: F401 - spawns ffmpeg without fork(), also for the reader below
from tests.cdp import chromium
from tests.web_support import served, wait_for, web_profile

pytestmark = pytest.mark.timeout(300)

SHOTS = [Path("/tmp/screens"), Path(__file__).resolve().parent.parent / "test-artifacts"]


async def shoot(page, name: str) -> None:
    for folder in SHOTS:
        await page.screenshot(folder / name)


async def centre_of(page, selector: str) -> tuple[float, float]:
    box = await page.evaluate(f"""(() => {{
      const r = document.querySelector({json.dumps(selector)}).getBoundingClientRect();
      return [r.left + r.width / 2, r.top + r.height / 2];
    }})()""")
    return box[0], box[1]


async def mouse(page, kind: str, x: float, y: float, modifiers: int = 0) -> None:
    """A real mouse event through the DevTools input domain (the page sees pointer events)."""
    await page.send("Input.dispatchMouseEvent", {
        "type": kind, "x": x, "y": y, "button": "left", "buttons": 1 if kind != "mouseReleased" else 0,
        "clickCount": 1, "modifiers": modifiers})


async def click_well(page, well: str, modifiers: int = 0) -> None:
    await page.evaluate(f"document.querySelector('[data-well=\"{well}\"]').scrollIntoView({{block: 'center'}})")
    x, y = await centre_of(page, f'[data-well="{well}"]')
    await mouse(page, "mouseMoved", x, y, modifiers)
    await mouse(page, "mousePressed", x, y, modifiers)
    await mouse(page, "mouseReleased", x, y, modifiers)


SHIFT, CTRL = 8, 2  # CDP modifier bits


async def stop_live(page, srv) -> None:
    """End the live stream before the daemon shuts down, so no frame is mid-render at exit."""
    await page.evaluate("(() => { if (document.getElementById('live-toggle').textContent.startsWith('Pause')) "
                        "document.getElementById('live-toggle').click(); })()")
    assert await wait_for(lambda: srv.station.live.viewers == 0, timeout_s=10)
    await asyncio.sleep(0.5)


async def signed_in(page, srv) -> None:
    await page.navigate(f"{srv.url}#token={srv.token}")
    await page.wait_for("document.getElementById('signin-btn').textContent === 'Signed in'")
    await page.wait_for("document.querySelectorAll('#vessel-map [data-well]').length === 96", timeout_s=20)
    await page.wait_for("document.getElementById('tl-f-name').value.length > 0", timeout_s=20)


async def test_map_plan_with_conditions_viewer_and_movie(tmp_path):
    profile = web_profile(320, 240)
    async with served(tmp_path, profile, speed=1000.0) as srv, chromium(1400, 1800) as page:
        world = srv.station.scope.truth.world
        await signed_in(page, srv)
        assert await page.evaluate("document.querySelector('[data-well=\"B3\"]').tagName") == "g"

        # A click on a well moves the stage there; the map marks where the objective is.
        await click_well(page, "C5")
        assert await wait_for(
            lambda: srv.station.scope.last_position is not None
            and world.well_at(srv.station.scope.last_position.x_um, srv.station.scope.last_position.y_um) == "C5",
            timeout_s=20,
        ), "a click on C5 did not move the stage there"
        await page.wait_for("document.getElementById('pos-well').textContent.startsWith('C5')", timeout_s=10)
        marker = await page.wait_for("document.getElementById('map-stage').dataset.at", timeout_s=10)
        c5 = await page.evaluate("(() => { const c = document.querySelector('[data-well=\"C5\"] circle'); "
                                 "return [Number(c.getAttribute('cx')), Number(c.getAttribute('cy'))]; })()")
        mx, my = (float(v) for v in marker.split(","))
        assert abs(mx - c5[0]) < 0.05 and abs(my - c5[1]) < 0.05  # the mark sits on C5's centre (mm)

        # Drag B2 -> B3 selects both; ctrl-click adds C3 alone: all three land in the plan form.
        x0, y0 = await centre_of(page, '[data-well="B2"]')
        x1, y1 = await centre_of(page, '[data-well="B3"]')
        await mouse(page, "mouseMoved", x0, y0)
        await mouse(page, "mousePressed", x0, y0)
        await mouse(page, "mouseMoved", (x0 + x1) / 2, y0)
        await mouse(page, "mouseMoved", x1, y1)
        await mouse(page, "mouseReleased", x1, y1)
        assert await page.evaluate("document.getElementById('tl-f-wells').value") == "B2, B3"
        await page.evaluate("""(() => {
          document.getElementById('cond-label').value = 'vehicle';
          document.getElementById('cond-notes').value = '0.1 % DMSO';
          document.getElementById('cond-apply').click();
        })()""")
        await click_well(page, "C3", CTRL)
        assert await page.evaluate("document.getElementById('tl-f-wells').value") == "B2, B3, C3"
        assert await page.evaluate("document.getElementById('cond-wells').value") == "C3"
        await page.evaluate("""(() => {
          document.getElementById('cond-label').value = 'R-17 5 µM';
          document.getElementById('cond-notes').value = '';
          document.getElementById('cond-apply').click();
        })()""")
        assert await page.evaluate("document.querySelectorAll('#vessel-map .map-well.selected').length") == 3
        assert await page.evaluate("document.querySelectorAll('#vessel-map .cond-dot').length") == 3
        # Shift-click extends from the last well clicked (C3) to C4; a second one removes nothing.
        await click_well(page, "C4", SHIFT)
        assert await page.evaluate("document.getElementById('tl-f-wells').value") == "B2, B3, C3, C4"
        await page.evaluate("""(() => {
          document.getElementById('map-mode-select').click();
        })()""")
        await click_well(page, "C4")  # in select mode a plain click toggles it off again
        assert await page.evaluate("document.getElementById('tl-f-wells').value") == "B2, B3, C3"

        # Hours, not seconds: 2 h apart for 4 h is 3 time points, counted on the page.
        await page.evaluate("""(() => {
          document.getElementById('tl-f-name').value = 'KVL-7 dose check LR-0412';
          for (const [id, v] of [['tl-f-interval', '2 h'], ['tl-f-duration', '4 h']]) {
            const e = document.getElementById(id); e.value = v; e.dispatchEvent(new Event('input'));
          }
        })()""")
        await page.wait_for("document.getElementById('tl-f-points').dataset.count === '3'")
        await page.wait_for("document.getElementById('tl-f-points').textContent.includes('per time point')", timeout_s=20)
        assert (await page.evaluate("document.getElementById('tl-f-points').textContent")).startswith("3 time points, one every 2 h for 4 h")
        await shoot(page, "desktop-plan.png")

        await page.evaluate("document.getElementById('tl-start').click()")
        await page.wait_for("document.getElementById('tl-badge').textContent === 'running'", timeout_s=30)
        tl = srv.station.scheduler
        assert tl.plan.interval_s == 7200 and tl.count == 3
        assert tl.plan.condition_of("B2").label == "vehicle" and tl.plan.condition_of("B2").notes == "0.1 % DMSO"
        assert tl.plan.condition_of("C3").label == "R-17 5 µM"
        assert await wait_for(lambda: srv.station.active() is None, timeout_s=150), "the time-lapse did not finish"
        await page.wait_for("document.getElementById('tl-badge').textContent === 'completed'", timeout_s=30)
        await page.wait_for("document.querySelectorAll('#well-grid .well-card').length === 3", timeout_s=30)
        await page.wait_for("[...document.querySelectorAll('#well-grid .well-card img')].every(i => i.naturalWidth > 0)",
                            timeout_s=20)
        # Curves grouped by condition: the legend names the conditions, not the wells.
        await page.wait_for("[...document.querySelectorAll('#conf-plot .plot-legend text')].map(t => t.textContent).join('|') === 'vehicle|R-17 5 µM'",
                            timeout_s=20)
        assert await page.evaluate("document.querySelectorAll('#well-grid .spark').length") == 3
        await shoot(page, "desktop-completed.png")

        # The condition is in each frame's OME metadata and in the CSV exports.
        frames = srv.station.index.frames(tl.id)
        c3 = next(f for f in frames if f["well"] == "C3")
        with tifffile.TiffFile(srv.station.data_dir / c3["path"]) as tif:
            assert "R-17 5 µM" in tif.ome_metadata
        made = await srv.station.make_exports(tl.id)
        rows = list(csv.DictReader(io.StringIO((made.folder / "wells.csv").read_text(encoding="utf-8"))))
        assert {(r["well"], r["condition"], r["condition_notes"]) for r in rows} == {
            ("B2", "vehicle", "0.1 % DMSO"), ("B3", "vehicle", "0.1 % DMSO"), ("C3", "R-17 5 µM", "")}

        # The viewer: open B2-1, scrub back to the first time point, see the scale bar.
        await page.evaluate("document.querySelector('[data-position=\"B2-1\"] .card-open').click()")
        await page.wait_for("document.getElementById('viewer').open && document.getElementById('viewer-img').naturalWidth > 0",
                            timeout_s=20)
        assert await page.evaluate("document.getElementById('viewer-img').dataset.tp") == "2"
        await page.evaluate("""(() => { const s = document.getElementById('viewer-scrub');
          s.value = 0; s.dispatchEvent(new Event('input')); })()""")
        await page.wait_for("document.getElementById('viewer-img').dataset.tp === '0' && document.getElementById('viewer-img').complete")
        assert await page.evaluate("document.getElementById('viewer-pos').textContent") == "time point 1 · 1 of 3"
        bar_um = float(await page.wait_for("document.getElementById('viewer-bar').dataset.um"))
        bar_px = await page.evaluate("document.getElementById('viewer-bar-line').getBoundingClientRect().width")
        img_px = await page.evaluate("document.getElementById('viewer-img').clientWidth")
        px_um = profile.optics.pixel_size_um * profile.camera.width_px / img_px
        assert abs(bar_px * px_um - bar_um) < 0.02 * bar_um  # the bar is as long as it says
        assert await page.evaluate("document.getElementById('viewer-cond').textContent") == "condition: vehicle"
        await shoot(page, "desktop-viewer.png")
        await page.evaluate("document.getElementById('viewer-play').click()")
        await page.wait_for("document.getElementById('viewer-img').dataset.tp === '2'", timeout_s=10)

        # The movie link downloads an MP4 that decodes to one frame per time point.
        href = await page.evaluate("document.getElementById('viewer-movie').href")
        head = await page.evaluate(f"""fetch({json.dumps(href)}).then(r => r.arrayBuffer())
          .then(b => [b.byteLength, String.fromCharCode(...new Uint8Array(b.slice(4, 8)))])""")
        assert head[1] == "ftyp" and head[0] > 1000
        await stop_live(page, srv)
        async with aiohttp.ClientSession() as http:
            async with http.get(href, headers={"Authorization": f"Bearer {srv.token}"}) as r:
                assert r.status == 200 and r.headers["Content-Type"] == "video/mp4"
                movie = tmp_path / "b2.mp4"
                movie.write_bytes(await r.read())
        reader = imageio.get_reader(movie, "ffmpeg")
        decoded = [f for f in reader]
        reader.close()
        assert len(decoded) == 3
        assert decoded[0].shape[1] == profile.camera.width_px  # full width (320 px is under the 1024 px cap)
        assert page.errors() == []
        await stop_live(page, srv)


async def test_phone_layout_puts_status_and_alerts_first(tmp_path):
    profile = web_profile(320, 240)
    async with served(tmp_path, profile, speed=1000.0) as srv, chromium(390, 844) as page:
        await signed_in(page, srv)
        tops = await page.evaluate("""(() => Object.fromEntries(['verdict', 'tl-h', 'alerts-h', 'live-h', 'control-h', 'plan-h', 'vessel-h']
          .map(id => [id, document.getElementById(id).getBoundingClientRect().top + scrollY])))()""")
        assert tops["verdict"] < tops["tl-h"] < tops["alerts-h"] < tops["live-h"]
        assert tops["alerts-h"] < 1200, tops  # status and alerts within the first screen and a half
        assert tops["alerts-h"] < tops["control-h"] and tops["alerts-h"] < tops["plan-h"]
        # Nothing sticks out of the 390 px screen: the x/y/z fields, the plan form, the map.
        wide = await page.evaluate("""[...document.querySelectorAll('input, select, button, svg.vessel-map')]
          .filter(e => e.offsetParent !== null && e.getBoundingClientRect().right > 390.5).map(e => e.id || e.className)""")
        assert wide == []
        assert await page.evaluate("document.documentElement.scrollWidth") <= 390
        logo = await page.evaluate("(() => { const r = document.querySelector('.logo').getBoundingClientRect(); return [r.width, r.height]; })()")
        assert logo[0] == logo[1] == 30  # round, not squashed

        # At the home position the stage is off the plate, and the readout says so.
        await page.evaluate("""(() => {
          for (const [id, v] of [['abs-x', 0], ['abs-y', 0]]) { const e = document.getElementById(id); e.value = v; e.dispatchEvent(new Event('input')); }
          document.querySelector('#abs-form button').click();
        })()""")
        await page.wait_for("document.getElementById('pos-well').textContent === 'off the vessel'", timeout_s=20)

        await page.evaluate("""(() => {
          for (const [id, v] of [['tl-f-interval', '1 h'], ['tl-f-duration', '1 h']]) {
            const e = document.getElementById(id); e.value = v; e.dispatchEvent(new Event('input'));
          }
          document.getElementById('tl-start').click();
        })()""")
        assert await wait_for(lambda: srv.station.scheduler is not None, timeout_s=30)
        assert await wait_for(lambda: srv.station.active() is None, timeout_s=120)
        await page.wait_for("document.getElementById('tl-badge').textContent === 'completed'", timeout_s=30)
        await page.wait_for("document.querySelectorAll('#well-grid .spark').length === 3", timeout_s=30)
        # The sparklines are drawn thick enough to see.
        stroke = await page.evaluate("getComputedStyle(document.querySelector('#well-grid .spark')).strokeWidth")
        assert float(stroke.removesuffix("px")) >= 2
        notes = await page.evaluate("document.getElementById('growth-notes').textContent")
        assert "not enough time yet" in notes and "doubling time 0" not in notes
        verdict = await page.evaluate("document.getElementById('verdict-answer').textContent")
        assert "1 wells" not in verdict
        await asyncio.sleep(0.3)
        await shoot(page, "phone-completed.png")
        await page.send("Emulation.setDeviceMetricsOverride", {"width": 390, "height": 844, "deviceScaleFactor": 1, "mobile": False})
        shot = await page.send("Page.captureScreenshot", {"format": "png"})  # the first screen as a phone shows it
        for folder in SHOTS:
            import base64
            (folder / "phone-first-screen.png").write_bytes(base64.b64decode(shot["data"]))
        assert page.errors() == []
        await stop_live(page, srv)
