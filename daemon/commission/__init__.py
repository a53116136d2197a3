"""Commissioning: measuring a scope with its own camera and stage (``phasewatch commission``).

Exposure (:mod:`.exposure`), the stage-to-image map by registration (:mod:`.registration`,
:mod:`.image_map`), backlash and repeatability (:mod:`.backlash`), settling (:mod:`.settle`),
the run that strings them together (:mod:`.run`) and what it writes (:mod:`.report`).
"""


class CommissionRefused(Exception):
    """Commissioning cannot measure here; ``str()`` is one line saying why and what to do."""
