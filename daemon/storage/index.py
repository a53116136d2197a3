"""The SQLite index of a data folder: time-lapses, time points, positions, frames, alerts.

Everything a resumed time-lapse needs lives here (the plan, t0, state, every time point
and its outcome, the focus tracker, the culture watch), so a process killed at any
moment can be restarted on the same folder and go on. The database runs in WAL mode with
``synchronous=FULL``: a committed row survives a power cut, and a reader in another
process (``timelapse list``, the web service) never blocks the writer.

All methods are blocking; the scheduler calls them through ``asyncio.to_thread``. One
connection is shared between threads under a lock.
"""

from __future__ import annotations

import contextlib
import datetime as dt
import json
import os
import re
import sqlite3
import threading
from collections.abc import Iterator
from pathlib import Path
from typing import Any

from daemon.states import (
    POSTED_REQUESTS,
    UNFINISHED_STATES,
    FrameState,
    PositionState,
    TimelapseState,
    TimePointState,
    values,
)
from daemon.storage.ome import FrameMeta
from drivers import atomic

INDEX_FILE = "index.sqlite"
SCHEMA_VERSION = 1
# Written into each time-lapse's folder when it is created: what the frames' own
# metadata cannot tell (the plan, the profile, the schedule), so a lost index can be
# rebuilt whole from the folder.
RECORD_FILE = "timelapse.json"
_RECORD_COLUMNS = (
    "id", "name", "folder", "plan_json", "profile_path", "profile_name", "created_s", "t0_s",
    "interval_s", "count", "n_positions", "reserve_mb",
)
# Cultures are private to the lab: without systemd's UMask the data folder and every file
# in it are still readable by their owner only.
DATA_FOLDER_MODE = 0o700
DATA_FILE_MODE = 0o600

TIMELAPSE_STATES = values(TimelapseState)
TIME_POINT_STATES = values(TimePointState)
_POSITION_STATES = values(PositionState)
_FRAME_STATES = values(FrameState)

_SCHEMA = f"""
CREATE TABLE IF NOT EXISTS timelapses (
    id INTEGER PRIMARY KEY,
    name TEXT NOT NULL,
    folder TEXT NOT NULL UNIQUE,
    plan_json TEXT NOT NULL,
    profile_path TEXT NOT NULL,
    profile_name TEXT NOT NULL,
    created_s REAL NOT NULL,
    t0_s REAL NOT NULL,
    interval_s REAL NOT NULL,
    count INTEGER NOT NULL,
    n_positions INTEGER NOT NULL,
    reserve_mb REAL NOT NULL,
    state TEXT NOT NULL CHECK (state IN {TIMELAPSE_STATES!r}),
    stop_reason TEXT,
    finished_s REAL,
    request TEXT,
    tracker_json TEXT,
    watch_json TEXT,
    first_focus_json TEXT
);
CREATE TABLE IF NOT EXISTS time_points (
    timelapse_id INTEGER NOT NULL REFERENCES timelapses(id),
    tp INTEGER NOT NULL,
    planned_s REAL NOT NULL,
    started_s REAL,
    finished_s REAL,
    status TEXT NOT NULL CHECK (status IN {TIME_POINT_STATES!r}),
    reason TEXT,
    n_ok INTEGER NOT NULL DEFAULT 0,
    n_failed INTEGER NOT NULL DEFAULT 0,
    PRIMARY KEY (timelapse_id, tp)
);
CREATE TABLE IF NOT EXISTS positions (
    timelapse_id INTEGER NOT NULL REFERENCES timelapses(id),
    tp INTEGER NOT NULL,
    key TEXT NOT NULL,
    well TEXT NOT NULL,
    site INTEGER NOT NULL,
    status TEXT NOT NULL CHECK (status IN {_POSITION_STATES!r}),
    reason TEXT,
    t_s REAL,
    focus_json TEXT,
    PRIMARY KEY (timelapse_id, tp, key)
);
CREATE TABLE IF NOT EXISTS frames (
    id INTEGER PRIMARY KEY,
    timelapse_id INTEGER NOT NULL REFERENCES timelapses(id),
    tp INTEGER NOT NULL,
    key TEXT NOT NULL,
    well TEXT NOT NULL,
    site INTEGER NOT NULL,
    z_index INTEGER NOT NULL,
    kind TEXT NOT NULL,
    path TEXT NOT NULL UNIQUE,
    t_s REAL NOT NULL,
    delta_t_s REAL NOT NULL,
    x_um REAL NOT NULL,
    y_um REAL NOT NULL,
    z_um REAL NOT NULL,
    exposure_ms REAL NOT NULL,
    gain_db REAL NOT NULL,
    bit_depth INTEGER NOT NULL,
    pixel_size_um REAL NOT NULL,
    width_px INTEGER NOT NULL,
    height_px INTEGER NOT NULL,
    bytes INTEGER NOT NULL,
    crc32 INTEGER NOT NULL,
    focus_score REAL,
    confluence REAL,
    focus_found INTEGER,
    status TEXT NOT NULL DEFAULT '{FrameState.OK}' CHECK (status IN {_FRAME_STATES!r}),
    reindexed INTEGER NOT NULL DEFAULT 0,
    UNIQUE (timelapse_id, tp, key, z_index, kind)
);
CREATE INDEX IF NOT EXISTS frames_by_position ON frames (timelapse_id, key, tp);
-- Where a frame lives besides the data folder: a copy on lab storage whose checksum was read
-- back and matched, and whether the local file has since been removed to make room.
CREATE TABLE IF NOT EXISTS frame_copies (
    frame_id INTEGER PRIMARY KEY REFERENCES frames(id),
    remote TEXT NOT NULL,
    md5 TEXT NOT NULL,
    verified_s REAL NOT NULL,
    local_pruned_s REAL
);
CREATE TABLE IF NOT EXISTS alerts (
    id INTEGER PRIMARY KEY,
    timelapse_id INTEGER REFERENCES timelapses(id),
    t_s REAL NOT NULL,
    level TEXT NOT NULL CHECK (level IN ('info', 'warning', 'error')),
    kind TEXT NOT NULL,
    message TEXT NOT NULL
);
"""


class DuplicateFrame(ValueError):
    """A frame with the same time-lapse, time point, position, plane and kind is indexed."""


def slug(name: str) -> str:
    """A file-name-safe form of a time-lapse name."""
    cleaned = re.sub(r"[^A-Za-z0-9._-]+", "-", name).strip("-.")
    return cleaned[:48] or "timelapse"


class IndexDamaged(OSError):
    """The index file is empty, not an SQLite database, or fails SQLite's integrity check."""


class Index:
    def __init__(self, path: Path, *, read_only: bool = False) -> None:
        self.path = path
        self.read_only = read_only
        self._lock = threading.RLock()
        if read_only:
            self._conn = _connect_read_only(path)
            self._conn.row_factory = sqlite3.Row
            return
        atomic.make_dirs(path.parent, mode=DATA_FOLDER_MODE)
        # Created here with its mode, so SQLite's -wal and -shm files (which copy the
        # database's permissions) are private too.
        atomic.create_private(path, permissions=DATA_FILE_MODE)
        # isolation_level=None: we open transactions ourselves, so each is explicit.
        self._conn = sqlite3.connect(path, check_same_thread=False, isolation_level=None, timeout=10.0)
        self._conn.row_factory = sqlite3.Row
        with self._lock:
            self._conn.execute("PRAGMA journal_mode=WAL")
            self._conn.execute("PRAGMA synchronous=FULL")
            self._conn.execute("PRAGMA foreign_keys=ON")
            self._conn.execute("PRAGMA busy_timeout=10000")
            version = self._conn.execute("PRAGMA user_version").fetchone()[0]
            if version > SCHEMA_VERSION:
                raise OSError(
                    f"{path}: index written by a newer phasewatch (schema {version}); upgrade phasewatch"
                )
            self._conn.executescript("BEGIN;" + _SCHEMA + f"PRAGMA user_version={SCHEMA_VERSION};COMMIT;")

    def close(self) -> None:
        with self._lock:
            self._conn.close()

    def __enter__(self) -> Index:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()

    @contextlib.contextmanager
    def _tx(self) -> Iterator[sqlite3.Connection]:
        with self._lock:
            self._conn.execute("BEGIN IMMEDIATE")
            try:
                yield self._conn
            except BaseException:
                self._conn.execute("ROLLBACK")
                raise
            self._conn.execute("COMMIT")

    def _all(self, sql: str, args: tuple[Any, ...] = ()) -> list[dict[str, Any]]:
        with self._lock:
            return [dict(r) for r in self._conn.execute(sql, args).fetchall()]

    def _one(self, sql: str, args: tuple[Any, ...] = ()) -> dict[str, Any] | None:
        with self._lock:
            row = self._conn.execute(sql, args).fetchone()
        return dict(row) if row is not None else None

    # -- time-lapses ---------------------------------------------------------------

    def create_timelapse(
        self,
        *,
        name: str,
        plan: dict[str, Any],
        profile_path: str,
        profile_name: str,
        created_s: float,
        t0_s: float,
        interval_s: float,
        count: int,
        n_positions: int,
        reserve_mb: float,
    ) -> int:
        with self._tx() as c:
            cur = c.execute(
                "INSERT INTO timelapses (name, folder, plan_json, profile_path, profile_name, created_s,"
                " t0_s, interval_s, count, n_positions, reserve_mb, state)"
                " VALUES (?, '', ?, ?, ?, ?, ?, ?, ?, ?, ?, ?)",
                (name, json.dumps(plan), profile_path, profile_name, created_s, t0_s, interval_s, count,
                 n_positions, reserve_mb, TimelapseState.RUNNING),
            )
            tl_id = int(cur.lastrowid)  # type: ignore[arg-type]
            c.execute("UPDATE timelapses SET folder = ? WHERE id = ?", (f"timelapses/{tl_id:04d}-{slug(name)}", tl_id))
        self._write_record(tl_id)
        return tl_id

    def _write_record(self, tl_id: int) -> None:
        row = self.require_timelapse(tl_id)
        folder = self.path.parent / row["folder"]
        atomic.make_dirs(folder, mode=DATA_FOLDER_MODE)
        record = {k: row[k] for k in _RECORD_COLUMNS}
        record["plan"] = json.loads(record.pop("plan_json"))
        atomic.write_text(folder / RECORD_FILE, json.dumps(record, indent=2) + "\n", permissions=DATA_FILE_MODE)

    def restore_timelapse(self, row: dict[str, Any]) -> None:
        """Put back a time-lapse row (with its own id) rebuilt from its folder."""
        cols = (*_RECORD_COLUMNS, "state", "stop_reason", "finished_s")
        with self._tx() as c:
            c.execute(
                f"INSERT INTO timelapses ({', '.join(cols)}) VALUES ({', '.join('?' * len(cols))})",
                tuple(row[k] for k in cols),
            )

    def restore_schedule(self, tl_id: int, *, spec: dict[str, Any], count: int, interval_s: float, n_positions: int) -> None:
        """What the frames tell of a time-lapse whose own record was lost: its positions, the
        plane analysed, how many time points and how far apart."""
        with self._tx() as c:
            c.execute(
                "UPDATE timelapses SET plan_json = ?, count = ?, interval_s = ?, n_positions = ? WHERE id = ?",
                (json.dumps(spec), count, interval_s, n_positions, tl_id),
            )

    def restore_time_points(self, tl_id: int, points: list[dict[str, Any]], positions: list[dict[str, Any]]) -> None:
        """Put back time points and positions rebuilt from the frames (rows as the tables hold them)."""
        with self._tx() as c:
            c.executemany(
                "INSERT INTO positions (timelapse_id, tp, key, well, site, status, t_s)"
                " VALUES (?, ?, ?, ?, ?, ?, ?) ON CONFLICT (timelapse_id, tp, key) DO NOTHING",
                [(tl_id, p["tp"], p["key"], p["well"], p["site"], p["status"], p["t_s"]) for p in positions],
            )
            c.executemany(
                "INSERT INTO time_points (timelapse_id, tp, planned_s, started_s, finished_s, status, reason, n_ok)"
                " VALUES (?, ?, ?, ?, ?, ?, ?, ?) ON CONFLICT (timelapse_id, tp) DO NOTHING",
                [(tl_id, p["tp"], p["planned_s"], p["started_s"], p["finished_s"], p["status"], p["reason"], p["n_ok"])
                 for p in points],
            )

    def set_t0(self, tl_id: int, t0_s: float) -> None:
        """Re-anchor a time-lapse that has not run any time point yet."""
        with self._tx() as c:
            c.execute(
                "UPDATE timelapses SET t0_s = ? WHERE id = ? AND NOT EXISTS"
                " (SELECT 1 FROM time_points WHERE timelapse_id = ?)",
                (t0_s, tl_id, tl_id),
            )

    def timelapse(self, tl_id: int) -> dict[str, Any] | None:
        return self._one("SELECT * FROM timelapses WHERE id = ?", (tl_id,))

    def require_timelapse(self, tl_id: int) -> dict[str, Any]:
        """The time-lapse's row; OSError naming the ones there are when it does not exist."""
        row = self.timelapse(tl_id)
        if row is None:
            known = ", ".join(str(t["id"]) for t in self.timelapses()) or "none"
            raise OSError(f"no time-lapse {tl_id} in {self.path} (time-lapses there: {known})")
        return row

    def timelapses(self) -> list[dict[str, Any]]:
        return self._all("SELECT * FROM timelapses ORDER BY id")

    def unfinished(self) -> list[dict[str, Any]]:
        return self._all(
            f"SELECT * FROM timelapses WHERE state IN {values(UNFINISHED_STATES)!r} ORDER BY id"
        )

    def set_state(
        self, tl_id: int, state: TimelapseState | str, *, reason: str | None = None, finished_s: float | None = None
    ) -> None:
        if state not in TIMELAPSE_STATES:
            raise ValueError(f"state must be one of {TIMELAPSE_STATES}, got {state!r}")
        with self._tx() as c:
            c.execute(
                "UPDATE timelapses SET state = ?, stop_reason = ?, finished_s = ? WHERE id = ?",
                (state, reason, finished_s, tl_id),
            )

    def save_resume_state(self, tl_id: int, **parts: Any) -> None:
        """Store the tracker, culture watch or first-focus planes (JSON-able dicts)."""
        allowed = {"tracker": "tracker_json", "watch": "watch_json", "first_focus": "first_focus_json"}
        sets = []
        args: list[Any] = []
        for name, value in parts.items():
            sets.append(f"{allowed[name]} = ?")
            args.append(None if value is None else json.dumps(value))
        if not sets:
            return
        with self._tx() as c:
            c.execute(f"UPDATE timelapses SET {', '.join(sets)} WHERE id = ?", (*args, tl_id))

    def resume_state(self, tl_id: int) -> dict[str, Any]:
        row = self._one(
            "SELECT tracker_json, watch_json, first_focus_json FROM timelapses WHERE id = ?", (tl_id,)
        )
        if row is None:
            return {}
        return {
            name: json.loads(row[col]) if row[col] else None
            for name, col in (("tracker", "tracker_json"), ("watch", "watch_json"), ("first_focus", "first_focus_json"))
        }

    def post_request(self, tl_id: int, request: str) -> None:
        """Ask the process running a time-lapse to pause, resume or abort it."""
        if request not in POSTED_REQUESTS:
            raise ValueError(f"request must be one of {values(POSTED_REQUESTS)}, got {request!r}")
        with self._tx() as c:
            c.execute("UPDATE timelapses SET request = ? WHERE id = ?", (request, tl_id))

    def peek_request(self, tl_id: int) -> str | None:
        """The pending request, without taking it (a cheap read, polled between positions)."""
        row = self._one("SELECT request FROM timelapses WHERE id = ?", (tl_id,))
        return None if row is None else row["request"]

    def take_request(self, tl_id: int) -> str | None:
        if self.peek_request(tl_id) is None:
            return None
        with self._tx() as c:
            row = c.execute("SELECT request FROM timelapses WHERE id = ?", (tl_id,)).fetchone()
            c.execute("UPDATE timelapses SET request = NULL WHERE id = ?", (tl_id,))
            return None if row is None or row[0] is None else str(row[0])

    # -- time points ---------------------------------------------------------------

    def begin_time_point(self, tl_id: int, tp: int, *, planned_s: float, started_s: float) -> None:
        """Mark a time point running; one left running by a crash keeps its first start time."""
        with self._tx() as c:
            c.execute(
                "INSERT INTO time_points (timelapse_id, tp, planned_s, started_s, status)"
                " VALUES (?, ?, ?, ?, ?)"
                " ON CONFLICT (timelapse_id, tp) DO UPDATE SET status = excluded.status",
                (tl_id, tp, planned_s, started_s, TimePointState.RUNNING),
            )

    def finish_time_point(
        self, tl_id: int, tp: int, *, status: TimePointState | str, finished_s: float, reason: str | None = None
    ) -> dict[str, Any]:
        if status not in TIME_POINT_STATES:
            raise ValueError(f"status must be one of {TIME_POINT_STATES}, got {status!r}")
        with self._tx() as c:
            counts = c.execute(
                "SELECT SUM(status = ?), SUM(status = ?) FROM positions WHERE timelapse_id = ? AND tp = ?",
                (PositionState.OK, PositionState.FAILED, tl_id, tp),
            ).fetchone()
            c.execute(
                "UPDATE time_points SET status = ?, finished_s = ?, reason = ?, n_ok = ?, n_failed = ?"
                " WHERE timelapse_id = ? AND tp = ?",
                (status, finished_s, reason, counts[0] or 0, counts[1] or 0, tl_id, tp),
            )
        row = self._one("SELECT * FROM time_points WHERE timelapse_id = ? AND tp = ?", (tl_id, tp))
        assert row is not None
        return row

    def record_missed(self, tl_id: int, missed: list[tuple[int, float]], reason: str) -> None:
        """Time points that were never run: recorded as missed, with why, never invented."""
        if not missed:
            return
        with self._tx() as c:
            c.executemany(
                "INSERT INTO time_points (timelapse_id, tp, planned_s, status, reason)"
                " VALUES (?, ?, ?, ?, ?) ON CONFLICT (timelapse_id, tp) DO NOTHING",
                [(tl_id, tp, planned_s, TimePointState.MISSED, reason) for tp, planned_s in missed],
            )

    def time_points(self, tl_id: int) -> list[dict[str, Any]]:
        return self._all("SELECT * FROM time_points WHERE timelapse_id = ? ORDER BY tp", (tl_id,))

    # Bounded reads for status answers: counts and the latest rows, never a whole run.

    def time_point_counts(self, tl_id: int) -> dict[str, int]:
        """Time points of a time-lapse by status."""
        rows = self._all("SELECT status, COUNT(*) AS n FROM time_points WHERE timelapse_id = ? GROUP BY status", (tl_id,))
        return {r["status"]: int(r["n"]) for r in rows}

    def recent_time_points(self, tl_id: int, limit: int) -> list[dict[str, Any]]:
        """The ``limit`` latest time points, oldest first."""
        rows = self._all("SELECT * FROM time_points WHERE timelapse_id = ? ORDER BY tp DESC LIMIT ?", (tl_id, limit))
        return rows[::-1]

    def missed_ranges(self, tl_id: int, limit: int) -> list[dict[str, Any]]:
        """Missed time points as runs of consecutive ones with the same reason (the ``limit``
        latest, oldest first): first_tp, last_tp, count, planned_s of the first, reason."""
        rows = self._all(
            "SELECT MIN(tp) AS first_tp, MAX(tp) AS last_tp, COUNT(*) AS count, MIN(planned_s) AS planned_s, reason"
            " FROM (SELECT tp, planned_s, reason, tp - ROW_NUMBER() OVER (PARTITION BY reason ORDER BY tp) AS run"
            "       FROM time_points WHERE timelapse_id = ? AND status = ?)"
            " GROUP BY reason, run ORDER BY first_tp DESC LIMIT ?",
            (tl_id, TimePointState.MISSED, limit),
        )
        return rows[::-1]

    def frame_counts(self, tl_id: int) -> tuple[int, int]:
        """(frames indexed, of which not ok)."""
        row = self._one(
            "SELECT COUNT(*) AS n, COALESCE(SUM(status != ?), 0) AS bad FROM frames WHERE timelapse_id = ?",
            (FrameState.OK, tl_id),
        )
        return (int(row["n"]), int(row["bad"])) if row else (0, 0)

    def recent_frames(self, tl_id: int, time_points: int) -> list[dict[str, Any]]:
        """Frames of the ``time_points`` latest time points that have frames."""
        return self._all(
            "SELECT * FROM frames WHERE timelapse_id = ? AND tp >= COALESCE("
            " (SELECT MIN(tp) FROM (SELECT DISTINCT tp FROM frames WHERE timelapse_id = ? ORDER BY tp DESC LIMIT ?)), 0)"
            " ORDER BY tp, key, z_index, kind",
            (tl_id, tl_id, time_points),
        )

    def recent_alerts(self, tl_id: int, limit: int) -> list[dict[str, Any]]:
        rows = self._all("SELECT * FROM alerts WHERE timelapse_id = ? ORDER BY id DESC LIMIT ?", (tl_id, limit))
        return rows[::-1]

    def recent_failed_positions(self, tl_id: int, limit: int) -> list[dict[str, Any]]:
        rows = self._all(
            "SELECT * FROM positions WHERE timelapse_id = ? AND status != ? ORDER BY rowid DESC LIMIT ?",
            (tl_id, PositionState.OK, limit),
        )
        return rows[::-1]

    def time_point(self, tl_id: int, tp: int) -> dict[str, Any] | None:
        return self._one("SELECT * FROM time_points WHERE timelapse_id = ? AND tp = ?", (tl_id, tp))

    # -- positions -----------------------------------------------------------------

    def record_position(
        self,
        tl_id: int,
        tp: int,
        *,
        key: str,
        well: str,
        site: int,
        status: PositionState | str,
        reason: str | None = None,
        t_s: float | None = None,
        focus: dict[str, Any] | None = None,
    ) -> None:
        with self._tx() as c:
            c.execute(
                "INSERT INTO positions (timelapse_id, tp, key, well, site, status, reason, t_s, focus_json)"
                " VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?)"
                " ON CONFLICT (timelapse_id, tp, key) DO UPDATE SET status = excluded.status,"
                " reason = excluded.reason, t_s = excluded.t_s, focus_json = excluded.focus_json",
                (tl_id, tp, key, well, site, status, reason, t_s, json.dumps(focus) if focus else None),
            )

    def positions(self, tl_id: int, tp: int | None = None) -> list[dict[str, Any]]:
        if tp is None:
            return self._all("SELECT * FROM positions WHERE timelapse_id = ? ORDER BY tp, key", (tl_id,))
        return self._all(
            "SELECT * FROM positions WHERE timelapse_id = ? AND tp = ? ORDER BY key", (tl_id, tp)
        )

    # -- frames --------------------------------------------------------------------

    def add_frame(
        self, meta: FrameMeta, *, path: str, nbytes: int, crc32: int, width_px: int, height_px: int,
        reindexed: bool = False,
    ) -> int:
        try:
            with self._tx() as c:
                cur = c.execute(
                    "INSERT INTO frames (timelapse_id, tp, key, well, site, z_index, kind, path, t_s,"
                    " delta_t_s, x_um, y_um, z_um, exposure_ms, gain_db, bit_depth, pixel_size_um,"
                    " width_px, height_px, bytes, crc32, focus_score, confluence, focus_found, reindexed)"
                    " VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?)",
                    (
                        meta.timelapse_id, meta.tp, meta.key, meta.well, meta.site, meta.z_index, meta.kind,
                        path, meta.t_s, meta.delta_t_s, meta.x_um, meta.y_um, meta.z_um, meta.exposure_ms,
                        meta.gain_db, meta.bit_depth, meta.pixel_size_um, width_px, height_px, nbytes, crc32,
                        meta.focus_score, meta.confluence,
                        None if meta.focus_found is None else int(meta.focus_found), int(reindexed),
                    ),
                )
                return int(cur.lastrowid)  # type: ignore[arg-type]
        except sqlite3.IntegrityError as exc:
            raise DuplicateFrame(f"frame {meta.identity} is already indexed ({exc})") from None

    def frames(self, tl_id: int | None = None, tp: int | None = None) -> list[dict[str, Any]]:
        if tl_id is None:
            return self._all("SELECT * FROM frames ORDER BY id")
        if tp is None:
            return self._all(
                "SELECT * FROM frames WHERE timelapse_id = ? ORDER BY tp, key, z_index, kind", (tl_id,)
            )
        return self._all(
            "SELECT * FROM frames WHERE timelapse_id = ? AND tp = ? ORDER BY key, z_index, kind", (tl_id, tp)
        )

    def frame_planes(self, tl_id: int, tp: int, key: str) -> set[tuple[int, str]]:
        """(z_index, kind) of the frames already indexed for one position at one time point."""
        rows = self._all(
            "SELECT z_index, kind FROM frames WHERE timelapse_id = ? AND tp = ? AND key = ?", (tl_id, tp, key)
        )
        return {(r["z_index"], r["kind"]) for r in rows}

    def set_confluence(self, frame_ids: list[int], confluence: float) -> None:
        """Store the confluence found on a plane (its raw and corrected frames share it)."""
        with self._tx() as c:
            c.executemany("UPDATE frames SET confluence = ? WHERE id = ?", [(confluence, i) for i in frame_ids])

    def frames_awaiting_analysis(self, tl_id: int, z_index: int) -> list[dict[str, Any]]:
        """Frames of the analysed plane still without confluence (analysis cut off by a restart)."""
        return self._all(
            "SELECT * FROM frames WHERE timelapse_id = ? AND z_index = ? AND confluence IS NULL AND status = ?"
            " ORDER BY tp, key, kind", (tl_id, z_index, FrameState.OK),
        )

    def frame_status(self, frame_id: int) -> str | None:
        row = self._one("SELECT status FROM frames WHERE id = ?", (frame_id,))
        return None if row is None else str(row["status"])

    def set_frame_status(self, frame_id: int, status: FrameState | str) -> None:
        if status not in _FRAME_STATES:
            raise ValueError(f"status must be one of {_FRAME_STATES}, got {status!r}")
        with self._tx() as c:
            c.execute("UPDATE frames SET status = ? WHERE id = ?", (status, frame_id))

    # -- alerts --------------------------------------------------------------------

    # -- copies on lab storage --------------------------------------------------------

    def frames_to_copy(self, limit: int = 10000) -> list[dict[str, Any]]:
        """Frames in good order with no verified copy yet, oldest first."""
        return self._all(
            "SELECT f.* FROM frames f LEFT JOIN frame_copies c ON c.frame_id = f.id"
            " WHERE c.frame_id IS NULL AND f.status = ? ORDER BY f.id LIMIT ?", (FrameState.OK, limit),
        )

    def record_copy(self, frame_id: int, *, remote: str, md5: str, t_s: float) -> None:
        with self._tx() as c:
            c.execute(
                "INSERT OR REPLACE INTO frame_copies (frame_id, remote, md5, verified_s) VALUES (?, ?, ?, ?)",
                (frame_id, remote, md5, t_s),
            )

    def frames_prunable(self, limit: int = 1000) -> list[dict[str, Any]]:
        """Frames with a verified copy whose local file is still here, oldest first."""
        return self._all(
            "SELECT f.*, c.remote, c.md5 FROM frames f JOIN frame_copies c ON c.frame_id = f.id"
            " WHERE c.local_pruned_s IS NULL ORDER BY f.t_s, f.id LIMIT ?", (limit,),
        )

    def record_pruned(self, frame_id: int, t_s: float) -> None:
        with self._tx() as c:
            c.execute("UPDATE frame_copies SET local_pruned_s = ? WHERE frame_id = ?", (t_s, frame_id))

    def frame_copy(self, frame_id: int) -> dict[str, Any] | None:
        """Where a frame's copy lives (remote, md5, when verified, when the local file went), or None."""
        return self._one("SELECT * FROM frame_copies WHERE frame_id = ?", (frame_id,))

    def pruned_frame_ids(self) -> set[int]:
        return {r["frame_id"] for r in self._all("SELECT frame_id FROM frame_copies WHERE local_pruned_s IS NOT NULL")}

    def add_alert(self, tl_id: int | None, *, t_s: float, level: str, kind: str, message: str) -> dict[str, Any]:
        with self._tx() as c:
            cur = c.execute(
                "INSERT INTO alerts (timelapse_id, t_s, level, kind, message) VALUES (?, ?, ?, ?, ?)",
                (tl_id, t_s, level, kind, message),
            )
            alert_id = int(cur.lastrowid)  # type: ignore[arg-type]
        return {"id": alert_id, "timelapse_id": tl_id, "t_s": t_s, "level": level, "kind": kind, "message": message}

    def alerts(self, tl_id: int | None = None) -> list[dict[str, Any]]:
        if tl_id is None:
            return self._all("SELECT * FROM alerts ORDER BY id")
        return self._all("SELECT * FROM alerts WHERE timelapse_id = ? ORDER BY id", (tl_id,))


def _connect_read_only(path: Path) -> sqlite3.Connection:
    """A connection that never writes: ``mode=ro``, or ``immutable=1`` where SQLite could not
    create the WAL's shared-memory file (a read-only folder, a write-protected card)."""
    if not path.is_file():
        raise FileNotFoundError(2, "no index file", str(path))
    uri = path.resolve().as_uri()
    last: sqlite3.Error | None = None
    # In a folder nobody can write, nobody is writing the index either: reading it as
    # immutable is safe there, and leaves no -wal or -shm file behind.
    queries = ("mode=ro", "mode=ro&immutable=1") if os.access(path.parent, os.W_OK) else ("mode=ro&immutable=1",)
    for query in queries:
        try:
            conn = sqlite3.connect(f"{uri}?{query}", uri=True, check_same_thread=False, isolation_level=None)
            conn.execute("SELECT count(*) FROM sqlite_master").fetchone()
            return conn
        except sqlite3.OperationalError as exc:
            last = exc
    assert last is not None
    raise last


def index_problem(path: Path) -> str | None:
    """Why the index at ``path`` cannot be used as it is (None: it can, or there is none yet)."""
    if not path.exists():
        return None
    if path.stat().st_size == 0:
        return "the index file is empty"
    try:
        conn = _connect_read_only(path)
    except sqlite3.Error as exc:
        return f"the index cannot be opened ({exc})"
    try:
        result = conn.execute("PRAGMA quick_check").fetchall()
        if [tuple(r) for r in result] != [("ok",)]:
            return f"the index fails SQLite's check ({'; '.join(str(r[0]) for r in result[:3])})"
        tables = {r[0] for r in conn.execute("SELECT name FROM sqlite_master WHERE type = 'table'")}
        if "timelapses" not in tables or "frames" not in tables:
            return "the index has no time-lapse tables"
    except sqlite3.Error as exc:
        return f"the index is damaged ({exc})"
    finally:
        conn.close()
    return None


def set_aside(path: Path, *, now_s: float) -> Path:
    """Rename a damaged index (and its WAL files) out of the way, never deleting it; the new name."""
    stamp = dt.datetime.fromtimestamp(now_s, tz=dt.timezone.utc).strftime("%Y%m%dT%H%M%SZ")
    target = path.with_name(f"{path.name}.damaged-{stamp}")
    n = 1
    while target.exists():
        n += 1
        target = path.with_name(f"{path.name}.damaged-{stamp}-{n}")
    for suffix in ("-wal", "-shm"):
        side = path.with_name(path.name + suffix)
        if not side.exists():
            continue
        if suffix == "-shm" or side.stat().st_size == 0:
            # The shared-memory file is rebuilt from the WAL by SQLite, and an empty WAL holds nothing.
            side.unlink()
        else:
            atomic.move(side, target.with_name(target.name + suffix))
    atomic.move(path, target)
    return target


def open_index(data_dir: Path, *, read_only: bool = False) -> Index:
    """The index of ``data_dir`` (created with the folder when missing, unless ``read_only``)."""
    path = data_dir / INDEX_FILE
    try:
        return Index(path, read_only=read_only)
    except sqlite3.DatabaseError as exc:
        raise IndexDamaged(
            f"{path}: cannot open the index ({exc}); 'phasewatch index rebuild --data {data_dir}' "
            "rebuilds it from the frame files"
        ) from None
