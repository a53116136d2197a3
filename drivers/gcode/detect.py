"""Which dialect a controller board speaks: by name, or found from what it answers.

``[stage] dialect = "auto"`` (the default) has the driver find out at connect
(:meth:`drivers.gcode.protocol.LineProtocol.open`): it listens for a start-up banner and
asks ``M115``, a line both families answer in their own way:

* a RepRap-family board describes itself and says ``ok`` (or refuses with ``Error:``,
  or ``echo:Unknown command``), or prints its ``start`` banner while booting;
* a grbl board refuses it with ``error:20`` (unsupported command), or prints its
  ``Grbl 1.1h ['$' for help]`` banner, an ``ALARM:`` or a ``[MSG:...]`` line.

The first line that tells them apart decides; lines that tell nothing (``ok`` alone
after boot chatter is ambiguous only in theory: a grbl board answers ``M115`` with an
error, never ``ok``) are passed over.
"""

from __future__ import annotations

from drivers.gcode.dialect import REPRAP, Dialect, ReplyKind, RepRapDialect
from drivers.gcode.grbl import GrblDialect

DIALECT_CHOICES = ("auto", "reprap", "grbl")
DETECT_COMMAND = "M115"


def make_dialect(key: str) -> Dialect:
    """A fresh dialect object for one connection (grbl's remembers its work offset)."""
    if key == "reprap":
        return RepRapDialect()
    if key == "grbl":
        return GrblDialect()
    raise ValueError(f"no dialect {key!r}; one of {', '.join(DIALECT_CHOICES[1:])}")


def tell_apart(line: str) -> str | None:
    """``"reprap"`` or ``"grbl"`` when ``line`` is one family's answer, else None."""
    text = line.strip()
    grbl = GrblDialect()
    kind = grbl.classify(text).kind
    if kind in (ReplyKind.BANNER, ReplyKind.ERROR, ReplyKind.ALARM, ReplyKind.REPORT) or text.startswith("[MSG:"):
        return "grbl"
    kind = REPRAP.classify(text).kind
    if kind in (ReplyKind.BANNER, ReplyKind.OK, ReplyKind.ERROR, ReplyKind.HALT, ReplyKind.RESEND, ReplyKind.BUSY):
        return "reprap"
    if text.startswith("FIRMWARE_NAME:") or text.startswith("echo:"):
        return "reprap"
    return None
