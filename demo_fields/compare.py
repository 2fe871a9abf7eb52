"""Compare the modes climodes recovered from the demo with the ones planted in it, and (given a
projection folder) the later decade's pseudo-PCs with the series planted there.

Usage: python demo_fields/compare.py RESULTS_DIR [PROJECTION_DIR]
"""

import sys
from pathlib import Path

import numpy as np
import xarray as xr

here = Path(__file__).parent
truth = xr.open_dataset(here / "planted_modes.nc")
found = xr.open_dataset(Path(sys.argv[1]) / "modes.nc")
w = np.sqrt(np.cos(np.deg2rad(found["lat"]))).broadcast_like(found["eof"].isel(mode=0))

print("planted mode              planted  recovered  |pattern r|  |PC r|   map rms error")
print("                          eigenvalue (degC^2)                        (degC)")
for k, name in enumerate(truth["name"].values):
    planted = truth["eof"].isel(mode=k).sel(lat=found["lat"], lon=found["lon"])
    recovered = found["eof"].isel(mode=k)
    both = planted.notnull() & recovered.notnull()
    a, b = (planted * w).where(both), (recovered * w).where(both)
    r_map = float((a * b).sum() / np.sqrt((a**2).sum() * (b**2).sum()))
    pcs = truth["pc"].isel(mode=k).sel(time=found["time"], method="nearest")
    r_pc = float(np.corrcoef(pcs, found["pc"].isel(mode=k))[0, 1])
    rms = float(np.sqrt(((planted - np.sign(r_map) * recovered) ** 2).where(both).mean()))
    print(f"{k + 1} {name:<22} {float(truth['eigenvalue'][k]):8.2f} {float(found['eigenvalue'][k]):10.2f}"
          f"  {abs(r_map):10.4f}  {abs(r_pc):7.4f}  {rms:8.3f}")

if len(sys.argv) > 2:
    later = xr.open_dataset(here / "later_planted_modes.nc")
    projection = xr.open_dataset(Path(sys.argv[2]) / "projection.nc")
    print()
    print("planted mode              |pseudo-PC r| with the later decade's planted PC")
    for k, name in enumerate(later["name"].values):
        r = float(np.corrcoef(later["pc"].isel(mode=k), projection["pc"].isel(mode=k))[0, 1])
        print(f"{k + 1} {name:<22} {abs(r):8.4f}")
