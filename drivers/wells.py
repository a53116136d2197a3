"""Well names: row letters and column numbers, as every plate and the simulator write them.

Rows run A..Z, then AA, AB, ... (1536-well plates run to row AF); columns count from 1.
'b03', 'B03' and 'B3' name the same well.
"""

from __future__ import annotations

import re

WELL_NAME_RE = re.compile(r"^\s*([A-Za-z]{1,2})\s*0*(\d{1,3})\s*$")


def row_label(row: int) -> str:
    """0 -> 'A', 25 -> 'Z', 26 -> 'AA' (1536-well plates run to row AF)."""
    if row < 0:
        raise ValueError("row must be >= 0")
    label = ""
    n = row + 1
    while n:
        n, rem = divmod(n - 1, 26)
        label = chr(ord("A") + rem) + label
    return label


def row_index(label: str) -> int:
    """Inverse of :func:`row_label`."""
    n = 0
    for ch in label.upper():
        n = n * 26 + (ord(ch) - ord("A") + 1)
    return n - 1


def normalise_well_name(name: str) -> str | None:
    """'b03' -> 'B3'; None when ``name`` is not a row letter and a column number."""
    m = WELL_NAME_RE.match(name)
    if not m or int(m.group(2)) == 0:
        return None
    return f"{m.group(1).upper()}{int(m.group(2))}"
