"""Setting the exposure: use the camera's range without saturating, and notice a dark lamp.

The brightest part of a phase-contrast field is the halo round the cells. The exposure is
set so the 99.9th percentile of the frame lies at :data:`TARGET_FRACTION` of the range
above the black level, with no more than :data:`MAX_SATURATED` of the pixels at full
scale (headroom for a brighter field elsewhere on the vessel; common practice, not from a
standard). The black level is a frame with the lamp switched off, so a frame no brighter
than it at the longest exposure tried means the lamp is off or the light path blocked.
"""

from __future__ import annotations

import dataclasses
import math

import numpy as np

from daemon.commission import CommissionRefused
from daemon.commission.session import Session

TARGET_FRACTION = 0.8
PERCENTILE = 99.9
MAX_SATURATED = 1e-4
TOLERANCE = 0.05  # of the range above black: close enough to the target
# The light of a working LED fills a phase-contrast frame well within this (common practice).
LONGEST_SEARCH_MS = 2000.0
LAMP_OFF_FRACTION = 0.02  # brightest pixels less than this far above black: no light
MAX_TRIES = 8


@dataclasses.dataclass(frozen=True)
class ExposureResult:
    exposure_ms: float
    gain_db: float
    black_dn: float
    high_dn: float  # the 99.9th percentile at the chosen exposure
    full_scale_dn: float
    saturated_fraction: float
    tries: list[tuple[float, float]]  # (exposure_ms, 99.9th percentile DN) of every frame

    @property
    def high_fraction(self) -> float:
        """Where the brightest pixels sit in the range above black (the target is 0.8)."""
        return (self.high_dn - self.black_dn) / (self.full_scale_dn - self.black_dn)

    def to_dict(self) -> dict[str, object]:
        return {
            "exposure_ms": round(self.exposure_ms, 3),
            "gain_db": self.gain_db,
            "black_dn": round(self.black_dn, 2),
            "p99_9_dn": round(self.high_dn, 2),
            "p99_9_of_range": round(self.high_fraction, 4),
            "saturated_fraction": self.saturated_fraction,
            "tries": [{"exposure_ms": round(e, 3), "p99_9_dn": round(h, 2)} for e, h in self.tries],
        }


def next_exposure_ms(exposure_ms: float, high_dn: float, black_dn: float, full_scale_dn: float, saturated: float,
                     *, lo_ms: float, hi_ms: float) -> float:
    """The exposure that brings the 99.9th percentile to the target, the sensor being linear
    above black (EMVA 1288's linear model); a saturated frame says only "less", so halve."""
    if saturated > MAX_SATURATED:
        proposal = exposure_ms / 2.0
    else:
        signal = max(high_dn - black_dn, 1e-3 * (full_scale_dn - black_dn))
        proposal = exposure_ms * TARGET_FRACTION * (full_scale_dn - black_dn) / signal
    return min(max(proposal, lo_ms), hi_ms)


async def set_exposure(session: Session) -> ExposureResult:
    """Find and use the exposure (gain as the profile has it); refuse when the lamp gives no light."""
    scope = session.scope
    lo_ms, hi_ms = session.exposure_range_ms()
    hi_ms = min(hi_ms, LONGEST_SEARCH_MS)
    exposure = min(max(session.exposure_ms, lo_ms), hi_ms)
    switched = scope.profile.illumination.control == "controller"
    tries: list[tuple[float, float]] = []
    black = 0.0
    for _ in range(MAX_TRIES):
        lit = await session.frame(exposure_ms=exposure)
        full = float(2**lit.bit_depth - 1)
        if switched:
            # The black level at this exposure: dark current grows with it.
            dark = await session.frame(exposure_ms=exposure, lamp=False)
            black = float(np.median(dark.pixels))
        px = lit.pixels
        high = float(np.percentile(px, PERCENTILE))
        saturated = float(np.mean(px >= full))
        tries.append((exposure, high))
        above = (high - black) / (full - black)
        if saturated <= MAX_SATURATED and abs(above - TARGET_FRACTION) <= TOLERANCE:
            break
        proposal = next_exposure_ms(exposure, high, black, full, saturated, lo_ms=lo_ms, hi_ms=hi_ms)
        if above < LAMP_OFF_FRACTION and exposure >= hi_ms:
            raise CommissionRefused(
                f"the lamp is off or the light path is blocked: at {exposure:g} ms the brightest pixels lie "
                f"{above * 100:.1f} % of full scale above the dark frame; switch the LED on "
                "(check [illumination] control, channel and level) and clear the light path"
            )
        if saturated > MAX_SATURATED and exposure <= lo_ms:
            raise CommissionRefused(
                f"the camera saturates even at its shortest exposure ({lo_ms:g} ms, {saturated * 100:.2f} % of pixels "
                "at full scale): dim the LED ([illumination] level) or lower [camera] gain_db"
            )
        if math.isclose(proposal, exposure, rel_tol=1e-6):
            break  # at a limit of the range: as good as it gets
        exposure = proposal
    exposure, high = tries[-1]  # the last exposure tried, not one proposed after it
    session.use_exposure(exposure)
    return ExposureResult(exposure, session.gain_db, black, high, full, saturated, tries)
