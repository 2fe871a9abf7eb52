"""World coastlines shipped inside the package, so no map ever needs the network.

The outlines are Natural Earth's 1:110m land masses (public domain), dissolved
from its Admin 0 countries; ``tools/build_coastline.py`` says how the file
``data/coastline_110m.npz`` was made.
"""

from __future__ import annotations

from functools import lru_cache
from importlib.resources import files

import numpy as np
from shapely.geometry import MultiLineString


@lru_cache(maxsize=1)
def coastlines() -> MultiLineString:
    """Coastlines (and lake shores) as closed line strings in lon/lat degrees."""
    with np.load(files("climodes") / "data" / "coastline_110m.npz") as data:
        points, starts = data["lonlat"], data["starts"]
    ends = np.append(starts[1:], len(points))
    return MultiLineString([points[a:b] for a, b in zip(starts, ends)])
