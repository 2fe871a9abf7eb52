"""Rebuild ``src/climodes/data/coastline_110m.npz`` from Natural Earth 1:110m countries.

The map figures draw coastlines from a file shipped inside the package, so that
no figure ever needs the network.  This script documents how that file was
made; it is not run by the build.

Source: Natural Earth 1:110m Admin 0 countries (public domain,
naturalearthdata.com terms of use), as shipped in the ``geopandas==0.14.4``
wheel under ``geopandas/datasets/naturalearth_lowres/``.  The country polygons
are dissolved into land masses and their outlines stored as line strings.

Usage::

    pip download --no-deps geopandas==0.14.4 && unzip geopandas-0.14.4-*.whl
    python tools/build_coastline.py geopandas/datasets/naturalearth_lowres/naturalearth_lowres.shp
"""

import sys
from pathlib import Path

import numpy as np
import shapefile  # pyshp, installed with cartopy
from shapely.geometry import shape
from shapely.ops import unary_union


def main(shp_path: str) -> None:
    reader = shapefile.Reader(shp_path)
    land = unary_union([shape(s.__geo_interface__).buffer(0) for s in reader.shapes()])
    rings = []
    for polygon in getattr(land, "geoms", [land]):
        rings.append(np.asarray(polygon.exterior.coords))
        rings.extend(np.asarray(r.coords) for r in polygon.interiors)
    points = np.concatenate(rings).astype(np.float32)
    starts = np.cumsum([0] + [len(r) for r in rings[:-1]]).astype(np.int32)
    out = Path(__file__).resolve().parents[1] / "src/climodes/data/coastline_110m.npz"
    np.savez_compressed(out, lonlat=points, starts=starts)
    print(f"wrote {out}: {len(rings)} rings, {len(points)} points")


if __name__ == "__main__":
    main(sys.argv[1])
