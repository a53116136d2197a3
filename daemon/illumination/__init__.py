"""Illumination correction and camera characterisation.

- :mod:`.correction`: dark/flat correction ``(raw − dark) / (flat − dark) × mean(flat − dark)``.
- :mod:`.calibration`: acquiring and storing dark and flat frames per profile, objective,
  exposure and gain, and picking the matching set.
- :mod:`.retrospective`: a flat field estimated from many positions of a time-lapse.
- :mod:`.characterize`: photon-transfer characterisation of the camera (EMVA 1288).
"""

from __future__ import annotations


class CalibrationError(ValueError):
    """Calibration frames are missing, mismatched or unusable. ``str()`` is one line saying
    what is wrong and what to do."""
