"""Exclusion polygons for ``surfrec heights --exclude-polygon FILE``: a plain text file of vertices.

Format (datum-frame mm, the frame of heights.h5):

```
# tank wall and drain, datum frame mm      <- '#' starts a comment
x,y                                         <- an optional header line
-200, 150
 200, 150
 200, 180
-200, 180
                                            <- a blank line starts the next polygon
10 -40
30 -40
20 -20
```

One vertex per line, x then y, separated by a comma, semicolon, tab or
spaces; the closing edge back to the first vertex is implied. Each polygon
needs at least three vertices and is taken as a simple polygon (even-odd
rule for self-intersecting ones).
"""

from __future__ import annotations

import re
from pathlib import Path

import numpy as np

from surfrec.errors import InputError

_SPLIT = re.compile(r"[,;\s]+")


def read_polygons(path) -> list[np.ndarray]:
    """Read an exclusion-polygon file.

    Parameters
    ----------
    path : str or Path

    Returns
    -------
    list of (N, 2) float64 arrays, datum-frame mm.

    Raises
    ------
    InputError
        Naming the file and line: unreadable file, a line that is not two
        numbers, a polygon of fewer than three vertices, no polygon at all.
    """
    p = Path(path)
    try:
        text = p.read_text(encoding="utf-8")
    except (OSError, UnicodeDecodeError) as exc:
        raise InputError(f"exclusion polygon file {p} cannot be read ({exc})") from None
    polygons, current, start = [], [], None

    def finish():
        if current:
            if len(current) < 3:
                raise InputError(f"{p}: the polygon starting on line {start} has {len(current)} vertices; "
                                 "at least 3 are needed")
            polygons.append(np.array(current, np.float64))
        current.clear()

    for lineno, raw in enumerate(text.splitlines(), 1):
        line = raw.split("#", 1)[0].strip()
        if not line:
            finish()
            continue
        parts = [s for s in _SPLIT.split(line) if s]
        if not polygons and not current and [s.lower() for s in parts] == ["x", "y"]:
            continue  # header
        try:
            vals = [float(s) for s in parts]
        except ValueError:
            vals = []
        if len(vals) != 2 or not all(np.isfinite(vals)):
            raise InputError(f"{p}, line {lineno}: expected two numbers 'x,y' (mm), got {raw.strip()!r}")
        if not current:
            start = lineno
        current.append(vals)
    finish()
    if not polygons:
        raise InputError(f"{p}: no polygon vertices found (one 'x,y' pair in mm per line)")
    return polygons
