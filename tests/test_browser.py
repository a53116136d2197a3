"""The browser interface in real headless Chromium (Debian's package), against the daemon on loopback.

Checks what a technician does: the page loads and signs in, the live image updates, a move
with the token moves the simulated stage, an autofocus plots its focus curve, and the demo
time-lapse starts and fills the positions panel. Screenshots go to test-artifacts/.
"""

from __future__ import annotations

import asyncio
from pathlib import Path

import pytest

from tests.cdp import chromium
from tests.web_support import served, wait_for, web_profile

pytestmark = pytest.mark.timeout(240)

ARTIFACTS = Path(__file__).resolve().parent.parent / "test-artifacts"

# Sum of the live image's pixels as drawn into a canvas: changes when a new frame arrives
# (the simulated sensor's shot noise alone makes every frame differ).
IMAGE_SUM = """(() => {
  const img = document.getElementById('live-img');
  if (!img.naturalWidth) return null;
  const c = document.createElement('canvas');
  c.width = img.naturalWidth; c.height = img.naturalHeight;
  const g = c.getContext('2d');
  g.drawImage(img, 0, 0);
  const d = g.getImageData(0, 0, c.width, c.height).data;
  let s = 0;
  for (let i = 0; i < d.length; i += 4) s += d[i];
  return s;
})()"""


async def test_page_live_view_move_autofocus_and_demo_time_lapse(tmp_path):
    profile = web_profile(320, 240)
    async with served(tmp_path, profile, speed=1000.0) as srv, chromium() as page:
        world = srv.station.scope.truth.world
        await page.navigate(f"{srv.url}#token={srv.token}")
        # Signed in from the link: the token left the address bar and went to local storage.
        await page.wait_for("document.getElementById('signin-btn').textContent === 'Signed in'")
        assert await page.evaluate("location.hash") == ""
        await page.wait_for("document.getElementById('live-img').naturalWidth > 0", timeout_s=30)
        assert await page.evaluate("document.getElementById('scope-name').textContent.includes('Larkspur Row')")

        first = await page.wait_for(IMAGE_SUM)
        changed = False
        for _ in range(40):
            await asyncio.sleep(0.1)
            now = await page.evaluate(IMAGE_SUM)
            if now != first:
                changed = True
                break
        assert changed, "the live image did not update"

        await page.evaluate("""(() => {
          document.getElementById('well-input').value = 'C5';
          document.querySelector('#well-form button').click();
        })()""")
        assert await wait_for(
            lambda: srv.station.scope.last_position is not None
            and world.well_at(srv.station.scope.last_position.x_um, srv.station.scope.last_position.y_um) == "C5",
            timeout_s=20,
        ), "the stage did not move to C5"
        await page.wait_for("document.getElementById('pos-well').textContent === 'C5'", timeout_s=10)
        # Bring the focus near the culture with the z field, as one turns a focus knob, then autofocus.
        await page.evaluate("""(() => {
          const z = document.getElementById('abs-z');
          z.value = 1470; z.dispatchEvent(new Event('input'));
          document.querySelector('#abs-form button').click();
        })()""")
        assert await wait_for(lambda: abs(srv.station.scope.last_position.z_um - 1470) < 0.01, timeout_s=20)
        await srv.station.scope.position()
        physical = srv.station.scope.truth.emulator.physical_position()
        assert world.well_at(physical.x_um, physical.y_um) == "C5"  # the simulated mechanics went there
        await page.screenshot(ARTIFACTS / "browser-live.png")

        await page.evaluate("document.getElementById('af-btn').click()")
        await page.wait_for("!document.getElementById('af-result').textContent.endsWith('…')", timeout_s=60)
        assert (await page.evaluate("document.getElementById('af-result').textContent")).startswith("in focus")
        points = await page.evaluate("document.querySelectorAll('#af-plot circle.plot-dot').length")
        assert points >= 5
        assert await page.evaluate("document.querySelectorAll('#af-plot line.mark-chosen').length") == 1
        assert srv.station.last_focus is not None and srv.station.last_focus["found"]
        assert points == srv.station.last_focus["frames"]
        await page.screenshot(ARTIFACTS / "browser-autofocus.png")

        # The demo plan is filled in; time points an hour apart keep this run short at clock speed 1000.
        assert (await page.evaluate("document.getElementById('tl-f-name').value")).startswith("KVL-7")
        await page.evaluate("""(() => {
          document.getElementById('tl-f-interval').value = '1 h';
          document.getElementById('tl-f-duration').value = '1 h';
          document.getElementById('tl-f-interval').dispatchEvent(new Event('input'));
          document.getElementById('tl-start').click();
        })()""")
        await page.wait_for("document.querySelectorAll('#well-grid .well-card').length === 3", timeout_s=90)
        await page.wait_for("[...document.querySelectorAll('#well-grid .well-card img')].every(i => i.naturalWidth > 0)",
                            timeout_s=20)
        assert await page.evaluate("document.getElementById('tl-badge').textContent") in ("running", "completed")
        await page.screenshot(ARTIFACTS / "browser-timelapse.png")
        assert await wait_for(lambda: srv.station.active() is None, timeout_s=90)
        await page.wait_for("document.getElementById('tl-badge').textContent === 'completed'", timeout_s=20)
        # One series per well, a dot per time point.
        await page.wait_for("document.querySelectorAll('#conf-plot circle.plot-dot').length >= 3", timeout_s=20)
        await page.screenshot(ARTIFACTS / "browser-completed.png")
        assert page.errors() == []
