"""Culture alerts per well: passaging confluence reached, sudden drop, focus failing.

The time-lapse feeds :meth:`CultureWatch.feed` the well readings of each time point
(:mod:`daemon.culture.readings`), that is :meth:`CultureWatch.update` once per well; the alerts
it returns go to the event stream and the interface. The whole watch (rules and per-well
state) round-trips through :meth:`CultureWatch.to_dict` / :meth:`CultureWatch.from_dict`,
so a restarted daemon neither repeats nor forgets an alert.
"""

from __future__ import annotations

import dataclasses
from collections import deque
from collections.abc import Iterable
from typing import TYPE_CHECKING, Any

from daemon.states import FocusState

if TYPE_CHECKING:
    from daemon.culture.readings import WellReading

CONFLUENCE_REACHED = "confluence_reached"
CONFLUENCE_DROP = "confluence_drop"
FOCUS_FAILING = "focus_failing"
ALERT_KINDS = (CONFLUENCE_REACHED, CONFLUENCE_DROP, FOCUS_FAILING)


@dataclasses.dataclass(frozen=True)
class Alert:
    kind: str
    well: str
    t_s: float
    message: str
    value: float | None = None

    def to_dict(self) -> dict[str, Any]:
        return dataclasses.asdict(self)

    @classmethod
    def from_dict(cls, d: dict[str, Any]) -> Alert:
        if d.get("kind") not in ALERT_KINDS:
            raise ValueError(f"unknown alert kind {d.get('kind')!r}; known: {', '.join(ALERT_KINDS)}")
        value = d.get("value")
        return cls(str(d["kind"]), str(d["well"]), float(d["t_s"]), str(d["message"]), None if value is None else float(value))


@dataclasses.dataclass(frozen=True)
class WatchRules:
    """When to raise an alert for one well.

    ``confluence_threshold`` defaults to 0.8, inside the 70–90 % range at which adherent
    cultures are usually passaged (common practice).
    """

    confluence_threshold: float = 0.8
    # Readings at or above the threshold in a row before it counts: one noisy frame
    # (debris, a bubble) must not call for passaging.
    confirm_points: int = 2
    # The threshold alert re-arms only once the well falls this far below it again
    # (after passaging), so readings hovering at the threshold do not repeat it.
    rearm_margin: float = 0.1
    # A drop is a fall from the recent peak by at least drop_abs (confluence fraction)
    # and drop_rel (of the peak); both, so that neither a sparse well's noise nor a small
    # wobble at high confluence reads as detachment.
    drop_abs: float = 0.15
    drop_rel: float = 0.3
    drop_window: int = 6
    focus_failures: int = 3

    def __post_init__(self) -> None:
        if not 0.0 < self.confluence_threshold <= 1.0:
            raise ValueError(f"confluence_threshold must be in (0, 1], got {self.confluence_threshold}")
        if self.confirm_points < 1 or self.drop_window < 2 or self.focus_failures < 1:
            raise ValueError("confirm_points and focus_failures must be >= 1, drop_window >= 2")
        if not 0.0 <= self.rearm_margin < self.confluence_threshold:
            raise ValueError("rearm_margin must be >= 0 and below the threshold")
        if not (0.0 < self.drop_abs <= 1.0 and 0.0 < self.drop_rel <= 1.0):
            raise ValueError("drop_abs and drop_rel must be in (0, 1]")

    def to_dict(self) -> dict[str, Any]:
        return dataclasses.asdict(self)

    @classmethod
    def from_dict(cls, d: dict[str, Any]) -> WatchRules:
        names = {f.name for f in dataclasses.fields(cls)}
        unknown = set(d) - names
        if unknown:
            raise ValueError(f"unknown alert rule(s): {', '.join(sorted(unknown))}; known: {', '.join(sorted(names))}")
        return cls(**d)


@dataclasses.dataclass
class _WellState:
    above_run: int = 0
    threshold_armed: bool = True
    recent: deque[float] = dataclasses.field(default_factory=deque)
    focus_fail_run: int = 0
    focus_alerted: bool = False

    def to_dict(self) -> dict[str, Any]:
        return {
            "above_run": self.above_run,
            "threshold_armed": self.threshold_armed,
            "recent": list(self.recent),
            "focus_fail_run": self.focus_fail_run,
            "focus_alerted": self.focus_alerted,
        }

    @classmethod
    def from_dict(cls, d: dict[str, Any]) -> _WellState:
        return cls(
            int(d["above_run"]), bool(d["threshold_armed"]), deque(float(v) for v in d["recent"]),
            int(d["focus_fail_run"]), bool(d["focus_alerted"]),
        )


class CultureWatch:
    """Per-well alert rules over a time-lapse. ``rules`` apply to every well unless
    :meth:`set_rules` gives a well its own (a user-set passaging confluence, say)."""

    def __init__(self, rules: WatchRules | None = None) -> None:
        self.rules = rules or WatchRules()
        self._well_rules: dict[str, WatchRules] = {}
        self._state: dict[str, _WellState] = {}

    def set_rules(self, well: str, rules: WatchRules) -> None:
        self._well_rules[well] = rules

    def rules_for(self, well: str) -> WatchRules:
        return self._well_rules.get(well, self.rules)

    def update(self, well: str, t_s: float, confluence: float | None, focus_found: bool) -> list[Alert]:
        """Feed one time point of one well; returns the alerts it raises (often none).

        ``confluence`` is None when the frame could not be analysed. A frame taken where
        focus was not found is not used for the confluence rules: a blurred frame reads
        low and would look like detachment.
        """
        rules = self.rules_for(well)
        st = self._state.setdefault(well, _WellState())
        alerts: list[Alert] = []
        if focus_found:
            st.focus_fail_run = 0
            st.focus_alerted = False
        else:
            st.focus_fail_run += 1
            if st.focus_fail_run >= rules.focus_failures and not st.focus_alerted:
                st.focus_alerted = True
                alerts.append(Alert(
                    FOCUS_FAILING, well, t_s,
                    f"well {well}: focus not found at {st.focus_fail_run} time points in a row "
                    "(empty well, bubble, condensation or a drifted plate?)",
                    float(st.focus_fail_run),
                ))
            return alerts
        if confluence is None:
            return alerts
        c = float(confluence)
        alerts.extend(self._check_drop(well, t_s, c, rules, st))
        alerts.extend(self._check_threshold(well, t_s, c, rules, st))
        return alerts

    def feed(self, readings: Iterable[WellReading]) -> list[Alert]:
        """Feed the well readings of one time point (:mod:`daemon.culture.readings`, which
        decides which sites count); returns the alerts they raise."""
        alerts: list[Alert] = []
        for r in readings:
            if r.informative:
                alerts.extend(self.update(r.well, r.t_s, r.confluence, r.focus != FocusState.FAILED))
        return alerts

    def _check_threshold(self, well: str, t_s: float, c: float, rules: WatchRules, st: _WellState) -> list[Alert]:
        if c >= rules.confluence_threshold:
            st.above_run += 1
        else:
            st.above_run = 0
            if c < rules.confluence_threshold - rules.rearm_margin:
                st.threshold_armed = True
        if st.threshold_armed and st.above_run >= rules.confirm_points:
            st.threshold_armed = False
            return [Alert(
                CONFLUENCE_REACHED, well, t_s,
                f"well {well} reached {c * 100:.0f} % confluence "
                f"(passaging threshold {rules.confluence_threshold * 100:.0f} %)",
                c,
            )]
        return []

    def _check_drop(self, well: str, t_s: float, c: float, rules: WatchRules, st: _WellState) -> list[Alert]:
        alerts: list[Alert] = []
        if st.recent:
            peak = max(st.recent)
            fall = peak - c
            if fall >= rules.drop_abs and fall >= rules.drop_rel * peak:
                alerts.append(Alert(
                    CONFLUENCE_DROP, well, t_s,
                    f"well {well}: confluence fell from {peak * 100:.0f} % to {c * 100:.0f} % "
                    "(cells detaching or contamination?)",
                    c,
                ))
                # Start over from the new level: the same fall is reported once, a further one again.
                st.recent.clear()
        st.recent.append(c)
        while len(st.recent) > rules.drop_window:
            st.recent.popleft()
        return alerts

    def to_dict(self) -> dict[str, Any]:
        return {
            "rules": self.rules.to_dict(),
            "well_rules": {w: r.to_dict() for w, r in self._well_rules.items()},
            "state": {w: s.to_dict() for w, s in self._state.items()},
        }

    @classmethod
    def from_dict(cls, d: dict[str, Any]) -> CultureWatch:
        watch = cls(WatchRules.from_dict(d.get("rules", {})))
        for well, r in d.get("well_rules", {}).items():
            watch.set_rules(well, WatchRules.from_dict(r))
        for well, s in d.get("state", {}).items():
            watch._state[well] = _WellState.from_dict(s)
        return watch
