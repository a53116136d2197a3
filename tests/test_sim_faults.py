"""The simulated controller: faults scheduled from the profile, and no leftovers after a kill.

Reproducers: a process running the simulated controller killed with SIGKILL leaves its
pseudo-terminal folder behind (removed at the next start); faults could be injected only
from Python (now a ``[sim.faults]`` profile section schedules them, strictly loaded).
"""

from __future__ import annotations

import asyncio
import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import pytest

from daemon.profile import load_profile
from drivers.clock import ScaledClock
from drivers.options import ConfigError
from drivers.sim.config import SimFaults
from drivers.sim.controller import BANNER, LINK_DIR_PREFIX, OWNER_FILE, GcodeEmulator, remove_stale_link_dirs
from tests.gcode_rig import FOCUS, MOTION, STAGE, RawClient, wait_until
from tests.helpers import sim_profile, sim_scope

pytestmark = pytest.mark.timeout(60)
REPO = Path(__file__).resolve().parent.parent

_RUN_EMULATOR = """
import sys, time
from drivers.clock import ScaledClock
from drivers.sim.controller import GcodeEmulator
from tests.gcode_rig import FOCUS, MOTION, STAGE
emulator = GcodeEmulator(clock=ScaledClock(speed=1.0, start_s=1.77e9), stage=STAGE, focus=FOCUS, motion=MOTION)
print(emulator.start(), flush=True)
time.sleep(60)
"""


def test_a_sigkilled_emulator_leaves_a_folder_the_next_start_removes() -> None:
    proc = subprocess.Popen([sys.executable, "-c", _RUN_EMULATOR], cwd=REPO, stdout=subprocess.PIPE, text=True)
    try:
        link = Path(proc.stdout.readline().strip())  # type: ignore[union-attr]
        assert link.is_symlink() and link.parent.name.startswith(LINK_DIR_PREFIX)
    finally:
        proc.send_signal(signal.SIGKILL)
        proc.wait(timeout=10)
    left = link.parent
    assert left.is_dir() and (left / OWNER_FILE).read_text().strip() == str(proc.pid)  # the leftover

    emulator = GcodeEmulator(clock=ScaledClock(speed=1.0, start_s=1.77e9), stage=STAGE, focus=FOCUS, motion=MOTION)
    mine = Path(emulator.start()).parent
    try:
        assert not left.exists(), "the killed emulator's folder was not removed at the next start"
        assert mine.is_dir()
    finally:
        emulator.stop()
    assert not mine.exists()


def test_only_folders_of_dead_owners_are_removed(tmp_path: Path) -> None:
    dead = subprocess.run([sys.executable, "-c", "import os; print(os.getpid())"], capture_output=True, text=True)
    folders = {name: tmp_path / f"{LINK_DIR_PREFIX}{name}" for name in ("dead", "alive", "old", "young")}
    for folder in folders.values():
        folder.mkdir()
    (folders["dead"] / OWNER_FILE).write_text(dead.stdout)
    (folders["alive"] / OWNER_FILE).write_text(f"{os.getpid()}\n")
    # No owner file (an older version): the old one's link points nowhere, so it is stale.
    (folders["old"] / "ttySIM0").symlink_to("/dev/pts/does-not-exist")
    an_hour_ago = time.time() - 3600
    os.utime(folders["old"], (an_hour_ago, an_hour_ago))
    removed = remove_stale_link_dirs(tmp_path)
    assert sorted(p.name for p in removed) == [f"{LINK_DIR_PREFIX}dead", f"{LINK_DIR_PREFIX}old"]
    assert folders["alive"].is_dir() and folders["young"].is_dir()


def _profile_with(tmp_path: Path, faults: str) -> Path:
    text = (REPO / "hw_profiles" / "sim.toml").read_text()
    path = tmp_path / "rehearsal.toml"
    path.write_text(text + "\n[sim.faults]\n" + faults + "\n")
    return path


def test_the_faults_section_is_strict(tmp_path: Path) -> None:
    with pytest.raises(ConfigError, match=r"\[sim.faults\] unplug_at_s: unknown option.*disconnect_at_s"):
        load_profile(_profile_with(tmp_path, "unplug_at_s = [60.0]"))
    with pytest.raises(ConfigError, match=r"\[sim.faults\] reset_at_s: must be"):
        load_profile(_profile_with(tmp_path, "reset_at_s = [-5.0]"))
    with pytest.raises(ConfigError, match=r"\[sim.faults\] stall_at_s: must be a finite number"):
        load_profile(_profile_with(tmp_path, "stall_at_s = [nan]"))
    profile = load_profile(_profile_with(
        tmp_path, "reset_at_s = [600.0]\ndisconnect_at_s = [60.0]\nreconnect_after_s = 5.0\ngarble_at_s = [30.0]"
    ))
    assert profile.sim.faults.schedule() == [(30.0, "garble"), (60.0, "disconnect"), (600.0, "reset")]
    assert load_profile("sim").sim.faults.schedule() == []  # none unless asked for


def test_scheduled_faults_strike_the_controller_on_its_clock() -> None:
    clock = ScaledClock(speed=100.0, start_s=1.77e9)
    emulator = GcodeEmulator(clock=clock, stage=STAGE, focus=FOCUS, motion=MOTION)
    client = RawClient(emulator.start())
    try:
        emulator.schedule_faults([(20.0, "reset"), (40.0, "disconnect")], reconnect_after_s=30.0)
        link = emulator.link_path
        # 20 simulated seconds at 100x: the reset banner comes in about 0.2 s.
        assert client.read_line() == BANNER.encode()
        assert wait_until(lambda: not os.path.exists(link), timeout_s=5.0)
        assert wait_until(lambda: os.path.exists(link), timeout_s=5.0)  # plugged back in
        assert wait_until(lambda: len(emulator.faults_struck) == 3, timeout_s=5.0)
        assert [f for _t, f in emulator.faults_struck] == ["reset", "disconnect", "reconnect"]
        times = [t for t, _f in emulator.faults_struck]
        assert times[0] >= 20.0 and times[1] >= 40.0 and times[2] >= 70.0
    finally:
        client.close()
        emulator.stop()


async def test_a_profile_schedules_faults_for_a_running_scope() -> None:
    # Late enough that the scope has opened (homed) first; then they strike an idle controller.
    faults = SimFaults(garble_at_s=[120.0], drop_reply_at_s=[130.0], stall_at_s=[140.0])
    profile = sim_profile(**{"sim.faults": faults})
    async with sim_scope(profile, speed=100.0) as scope:
        emulator = scope.truth.emulator  # type: ignore[attr-defined]
        deadline = time.monotonic() + 10.0
        while len(emulator.faults_struck) < 3 and time.monotonic() < deadline:
            await asyncio.sleep(0.05)
        assert [f for _t, f in emulator.faults_struck] == ["garble", "drop_reply", "stall"]
