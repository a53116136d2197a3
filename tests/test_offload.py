"""Frames copied to a real rclone SFTP server on loopback (``rclone serve sftp``), one that
vanishes half way through a copy included: nothing lost, nothing pruned unverified."""

from __future__ import annotations

import asyncio
import hashlib
import shutil
import socket
import subprocess
import time
from pathlib import Path

import pytest

from daemon.errors import Damaged
from daemon.storage.offload import Offloader, OffloadOptions
from daemon.storage.verify import VerifyProgress, verify_all
from tests.web_support import LOOPBACK, QUICK_PLAN, served, wait_for

pytestmark = pytest.mark.timeout(240)

RCLONE = shutil.which("rclone") or "/usr/bin/rclone"
needs_rclone = pytest.mark.skipif(not Path(RCLONE).exists(), reason="rclone not installed (Debian package rclone)")
USER, PASSWORD = "scope", "larkspur-row-7"


def free_port() -> int:
    with socket.socket() as s:
        s.bind((LOOPBACK, 0))
        return int(s.getsockname()[1])


class SftpServer:
    """``rclone serve sftp`` of a folder on a loopback port, which the test can stop and restart."""

    def __init__(self, root: Path, port: int, config: Path) -> None:
        self.root, self.port, self.config = root, port, config
        self.proc: subprocess.Popen[bytes] | None = None

    def start(self) -> None:
        self.proc = subprocess.Popen(
            [RCLONE, "serve", "sftp", str(self.root), "--addr", f"{LOOPBACK}:{self.port}", "--user", USER,
             "--pass", PASSWORD, "--config", str(self.config)],
            stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL,
        )
        deadline = time.monotonic() + 20
        while time.monotonic() < deadline:
            with socket.socket() as s:
                if s.connect_ex((LOOPBACK, self.port)) == 0:
                    return
            time.sleep(0.1)
        raise RuntimeError("rclone serve sftp did not start")

    def kill(self) -> None:
        assert self.proc is not None
        self.proc.kill()
        self.proc.wait(10)


def remote_spec(port: int, config: Path) -> str:
    obscured = subprocess.run([RCLONE, "obscure", PASSWORD, "--config", str(config)], capture_output=True,
                              text=True, check=True, timeout=30).stdout.strip()
    return f":sftp,host={LOOPBACK},port={port},user={USER},pass={obscured}:frames"


@needs_rclone
async def test_copy_verify_and_prune_with_a_server_that_vanishes(tmp_path):
    config = tmp_path / "rclone.conf"
    config.write_text("")
    store = tmp_path / "lab-store"
    store.mkdir()
    port = free_port()
    server = SftpServer(store, port, config)
    data = tmp_path / "data"
    async with served(data) as srv:
        async with srv.session.post(srv.u("/api/v1/timelapses"), headers=srv.auth, json={**QUICK_PLAN, "count": 3}) as r:
            tl = (await r.json())["id"]
        assert await wait_for(lambda: srv.station.active() is None, timeout_s=90)
        index = srv.station.index
        frames = index.frames(tl)
        assert len(frames) == 6
        total = sum(f["bytes"] for f in frames)
        free = {"bytes": 10**15}  # plenty of space: nothing may be pruned
        # A slow link (about 4 s for all frames), so the server can be stopped mid-copy.
        opts = OffloadOptions(remote=remote_spec(port, config), rclone=RCLONE, rclone_config=str(config),
                              bwlimit=f"{max(1, total // 4 // 1024)}K", prune_below_free_mb=1.0, timeout_s=60)
        off = Offloader(data, index, opts, free_bytes=lambda: free["bytes"])

        server.start()
        try:
            run = asyncio.create_task(off.run_once())
            # Stop the server once the first file has started to arrive.
            assert await wait_for(lambda: any(p.is_file() for p in store.rglob("*")), timeout_s=30)
            await asyncio.sleep(0.8)
            server.kill()
            first = await asyncio.wait_for(run, 90)
            print(f"server stopped mid-copy: {first.copied} of {len(frames)} frames verified; {first.rclone_error}")
            assert first.rclone_error is not None and "failed" in first.rclone_error
            assert first.copied < len(frames)

            # Only frames whose remote bytes match are recorded, and every local file is still there.
            for f in frames:
                copy = index.frame_copy(f["id"])
                assert (data / f["path"]).is_file()
                if copy is not None:
                    remote_file = store / "frames" / f["path"]
                    assert hashlib.md5(remote_file.read_bytes()).hexdigest() == copy["md5"]  # noqa: S324
            # With the server gone, low space prunes nothing that was not verified.
            free["bytes"] = 0
            second = await off.run_once()
            assert second.copied == 0 and second.rclone_error is not None
            pruned = index.pruned_frame_ids()
            assert pruned == {f["id"] for f in frames if index.frame_copy(f["id"]) is not None}
            for f in frames:
                assert (data / f["path"]).is_file() == (f["id"] not in pruned)
            free["bytes"] = 10**15

            # Back again: the next pass completes the copy, cut-off files included.
            server.start()
            third = await off.run_once()
            assert third.rclone_error is None, third
            assert first.copied + third.copied == len(frames)
            assert index.frames_to_copy() == []
            for f in frames:
                remote_file = store / "frames" / f["path"]
                # Checked here against the index's own CRC-32-verified bytes: the file as saved.
                assert index.frame_copy(f["id"])["md5"] == hashlib.md5(remote_file.read_bytes()).hexdigest()  # noqa: S324
                assert remote_file.stat().st_size == f["bytes"]

            # Space runs low: oldest frames go first, and only until there is room again.
            before = index.pruned_frame_ids()
            off = Offloader(data, index, opts,
                            free_bytes=lambda: 10**15 if len(index.pruned_frame_ids() - before) >= 2 else 0)
            fourth = await off.run_once()
            newly = index.pruned_frame_ids() - before
            assert fourth.pruned == 2 and len(newly) == 2
            remaining = sorted((f["t_s"], f["id"]) for f in frames if f["id"] not in before)
            assert newly == {fid for _, fid in remaining[:2]}

            # The storage check does not count pruned frames as missing; the index says where they are.
            progress = await verify_all(data, index, VerifyProgress())
            assert progress.missing == 0 and progress.damaged == 0
            for fid in index.pruned_frame_ids():
                copy = index.frame_copy(fid)
                assert copy["remote"] == opts.remote and copy["local_pruned_s"] is not None
                # Asked for by the page or the API, a pruned frame points to its copy and stays "ok".
                with pytest.raises(Damaged, match="moved to lab storage") as moved:
                    srv.station.archive.frame_path(tl, fid)
                assert opts.remote in str(moved.value)
                assert index.frame_status(fid) == "ok"
        finally:
            if server.proc is not None and server.proc.poll() is None:
                server.kill()


@needs_rclone
async def test_the_daemon_copies_after_each_time_point(tmp_path):
    """Served with an offload setting, the daemon sends each time point's frames without being
    asked (the scheduled pass is an hour away here), and counts them in /metrics."""
    config = tmp_path / "rclone.conf"
    config.write_text("")
    store = tmp_path / "lab-store"
    store.mkdir()
    port = free_port()
    server = SftpServer(store, port, config)
    server.start()
    try:
        opts = OffloadOptions(remote=remote_spec(port, config), rclone=RCLONE, rclone_config=str(config),
                              interval_s=3600.0, timeout_s=60)
        async with served(tmp_path / "data", offload=opts) as srv:
            async with srv.session.post(srv.u("/api/v1/timelapses"), headers=srv.auth,
                                        json={**QUICK_PLAN, "count": 2}) as r:
                tl = (await r.json())["id"]
            assert await wait_for(lambda: srv.station.active() is None, timeout_s=90)
            index = srv.station.index
            assert await wait_for(lambda: not index.frames_to_copy(), timeout_s=60)
            for f in index.frames(tl):
                remote_file = store / "frames" / f["path"]
                assert hashlib.md5(remote_file.read_bytes()).hexdigest() == index.frame_copy(f["id"])["md5"]  # noqa: S324
            async with srv.session.get(srv.u("/metrics"), headers=srv.auth) as r:
                text = await r.text()
            assert "phasewatch_offload_frames_copied_total 4.0" in text
    finally:
        server.kill()


def test_offload_file_is_loaded_strictly(tmp_path):
    from daemon.storage.offload import load_offload
    from drivers.options import ConfigError

    good = tmp_path / "offload.toml"
    good.write_text('[offload]\nremote = "labstore:incubator-2-left"\ninterval_s = 300\n')
    opts = load_offload(good)
    assert opts.remote == "labstore:incubator-2-left" and opts.interval_s == 300.0
    bad = tmp_path / "bad.toml"
    bad.write_text('[offload]\nremote = "labstore:x"\nintervall_s = 300\n')
    with pytest.raises(ConfigError) as err:
        load_offload(bad)
    assert "bad.toml" in str(err.value) and "intervall_s" in str(err.value) and "interval_s" in str(err.value)
    with pytest.raises(ConfigError, match="missing section"):
        (tmp_path / "empty.toml").write_text("")
        load_offload(tmp_path / "empty.toml")
