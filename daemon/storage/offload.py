"""Copy frames to lab storage with rclone, and free the data folder only of verified copies.

rclone (https://rclone.org, Debian package ``rclone``) reaches SFTP, WebDAV, SMB and
S3-compatible stores; the daemon runs it as a child process, so a slow or vanished server
only ever delays the copy, never a time point. One pass (:meth:`Offloader.run_once`):

1. frames in good order without a verified copy are checked against the index (size and
   CRC-32, as the background check does), and their MD5 is taken locally;
2. ``rclone copy --files-from`` sends them, keeping the data folder's layout;
3. ``rclone lsjson --hash`` reads the remote MD5 of each back; a frame counts as copied
   (recorded in the index's ``frame_copies``) only when it matches;
4. only when free space is below ``prune_below_free_mb``, local files of copied frames are
   removed, oldest first, until it is above again.

A copy cut off half way leaves a remote file whose checksum does not match (or none): that
frame stays uncopied, its local file stays, and the next pass sends it again.
"""

from __future__ import annotations

import asyncio
import contextlib
import dataclasses
import hashlib
import json
import logging
import shutil
import tempfile
import time
from collections.abc import Callable
from pathlib import Path
from typing import Any

from daemon.states import FrameState
from daemon.storage.index import Index
from daemon.storage.verify import check_file
from drivers.options import option

log = logging.getLogger(__name__)

MB = 1_000_000


@dataclasses.dataclass(frozen=True)
class OffloadOptions:
    remote: str = option(doc="rclone destination, remote and folder (e.g. 'labstore:incubator-2-left')")
    interval_s: float = option(600.0, doc="time between scheduled copy passes", min=10.0, unit="s")
    prune_below_free_mb: float = option(
        2000.0, doc="remove local files of verified frames only while free space is below this", min=0.0, unit="MB"
    )
    rclone: str = option("rclone", doc="the rclone program")
    rclone_config: str = option("", doc="rclone configuration file ('' for rclone's own default)")
    bwlimit: str = option("", doc="rclone --bwlimit value, so the copy leaves the network to the scope ('' for none)")
    timeout_s: float = option(600.0, doc="longest one rclone run may take before it is stopped", min=5.0, unit="s")


@dataclasses.dataclass
class OffloadPass:
    """What one pass did."""

    candidates: int = 0
    skipped_bad: int = 0  # frames whose local file no longer matches the index: never copied
    copied: int = 0  # verified this pass
    pruned: int = 0
    pruned_bytes: int = 0
    rclone_error: str | None = None  # one line, when rclone failed (server gone, say)


def load_offload(path: Path) -> OffloadOptions:
    """The ``[offload]`` section of a TOML file, strictly (unknown sections and options are errors)."""
    import tomllib

    from drivers.options import ConfigError, load_section

    try:
        raw = tomllib.loads(path.read_text())
    except OSError as exc:
        raise ConfigError(path, "", None, f"cannot read: {exc.strerror}") from None
    except tomllib.TOMLDecodeError as exc:
        raise ConfigError(path, "", None, f"not valid TOML: {exc}") from None
    for key, value in raw.items():
        if key != "offload" or not isinstance(value, dict):
            raise ConfigError(path, key, None, "unknown section; allowed: [offload]")
    if "offload" not in raw:
        raise ConfigError(path, "offload", None, "missing section [offload]")
    return load_section(OffloadOptions, raw["offload"], file=path, section="offload")


class RcloneError(RuntimeError):
    pass


def md5_of(path: Path) -> str:
    h = hashlib.md5()  # noqa: S324 - a transfer checksum rclone can read back, not security
    with open(path, "rb") as fh:
        while chunk := fh.read(1 << 20):
            h.update(chunk)
    return h.hexdigest()


def _local_md5(data_dir: Path, row: dict[str, Any]) -> str | None:
    """MD5 of a frame's file once it is shown to be the file the index describes (blocking)."""
    path = data_dir / row["path"]
    if check_file(path, row["bytes"], row["crc32"]) != FrameState.OK:
        return None
    return md5_of(path)


class Offloader:
    def __init__(
        self, data_dir: Path, index: Index, options: OffloadOptions, *,
        free_bytes: Callable[[], int] | None = None, now: Callable[[], float] = time.time,
    ) -> None:
        self.data_dir = data_dir
        self.index = index
        self.options = options
        self._free_bytes = free_bytes or (lambda: shutil.disk_usage(self.data_dir).free)
        self._now = now
        self._lock = asyncio.Lock()  # one pass at a time; a trigger during a pass waits for it

    async def _rclone(self, *args: str) -> str:
        o = self.options
        cmd = [o.rclone, *args, "--contimeout", "10s", "--timeout", "30s", "--retries", "1",
               "--low-level-retries", "2"]
        if o.rclone_config:
            cmd += ["--config", o.rclone_config]
        if o.bwlimit:
            cmd += ["--bwlimit", o.bwlimit]
        proc = await asyncio.create_subprocess_exec(
            *cmd, stdout=asyncio.subprocess.PIPE, stderr=asyncio.subprocess.PIPE,
        )
        try:
            out, err = await asyncio.wait_for(proc.communicate(), o.timeout_s)
        except (TimeoutError, asyncio.CancelledError):
            with contextlib.suppress(ProcessLookupError):
                proc.kill()
            await proc.wait()
            raise
        if proc.returncode != 0:
            lines = [ln for ln in err.decode(errors="replace").splitlines() if ln.strip()]
            raise RcloneError(f"rclone {args[0]} failed ({proc.returncode}): {lines[-1] if lines else 'no message'}")
        return out.decode()

    async def remote_md5s(self, paths: list[str]) -> dict[str, str]:
        """The remote MD5 of each of ``paths`` (relative to the remote folder) that exists there."""
        with tempfile.NamedTemporaryFile("w", suffix=".txt", delete=False) as fh:
            fh.write("\n".join(paths) + "\n")
            listing = Path(fh.name)
        try:
            out = await self._rclone("lsjson", "--hash", "--hash-type", "MD5", "--files-only", "-R",
                                     "--files-from", str(listing), self.options.remote)
        finally:
            listing.unlink()
        return {e["Path"]: (e.get("Hashes") or {}).get("md5", "") for e in json.loads(out or "[]")}

    async def run_once(self) -> OffloadPass:
        async with self._lock:
            result = OffloadPass()
            rows = await asyncio.to_thread(self.index.frames_to_copy)
            result.candidates = len(rows)
            local: dict[str, tuple[int, str]] = {}
            for row in rows:
                md5 = await asyncio.to_thread(_local_md5, self.data_dir, row)
                if md5 is None:
                    result.skipped_bad += 1
                else:
                    local[row["path"]] = (row["id"], md5)
            if local:
                try:
                    await self._copy(list(local))
                except RcloneError as exc:
                    result.rclone_error = str(exc)
                    log.warning("copy to %s: %s", self.options.remote, exc)
                # Read back what arrived, whatever rclone said: a run cut off half way has
                # still copied some frames completely.
                try:
                    remote = await self.remote_md5s(list(local))
                except RcloneError as exc:
                    result.rclone_error = result.rclone_error or str(exc)
                    remote = {}
                for path, (frame_id, md5) in local.items():
                    if remote.get(path) == md5:
                        await asyncio.to_thread(self.index.record_copy, frame_id, remote=self.options.remote,
                                                md5=md5, t_s=self._now())
                        result.copied += 1
            await self._prune(result)
            return result

    async def _copy(self, paths: list[str]) -> None:
        with tempfile.NamedTemporaryFile("w", suffix=".txt", delete=False) as fh:
            fh.write("\n".join(paths) + "\n")
            listing = Path(fh.name)
        try:
            await self._rclone("copy", "--files-from", str(listing), "--no-traverse", str(self.data_dir),
                               self.options.remote)
        finally:
            listing.unlink()

    async def _prune(self, result: OffloadPass) -> None:
        floor = self.options.prune_below_free_mb * MB
        if self._free_bytes() >= floor:
            return
        for row in await asyncio.to_thread(self.index.frames_prunable):
            if self._free_bytes() >= floor:
                break
            path = self.data_dir / row["path"]
            # The file must still be the one whose copy was verified: a changed file is kept.
            if await asyncio.to_thread(_local_md5, self.data_dir, row) != row["md5"]:
                continue
            # Recorded first: a power cut between the two leaves a file the index calls pruned
            # (harmless, the copy is verified), never a frame the index thinks is still here.
            await asyncio.to_thread(self.index.record_pruned, row["id"], self._now())
            await asyncio.to_thread(path.unlink, missing_ok=True)
            result.pruned += 1
            result.pruned_bytes += row["bytes"]
