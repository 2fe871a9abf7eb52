"""What the red-noise test costs: `climodes run` with and without `modes.noise_surrogates`.

Times the whole run (wall time, peak resident memory of the process tree, median of 3) on the demo field
(600 monthly steps x 1421 sea points) and on the 1-degree monthly benchmark field (720 steps x 65,160
points, generated on first use into benchmarks/data/), each with 0 and 100 surrogates.

Usage: python benchmarks/red_noise.py [--demo-only]
"""

from __future__ import annotations

import statistics
import sys
import tempfile
from pathlib import Path

sys.path.insert(0, str(Path(__file__).parent))
from fields import make_field, temporary_files_removed_at_exit  # noqa: E402
from run import CLIMODES, measured  # noqa: E402

from climodes.demo import write_demo_fields  # noqa: E402


def _config(paths: list[Path], variable: str, surrogates: int, extra: list[str]) -> list[str]:
    folder = Path(tempfile.mkdtemp())
    config = folder / "run.yaml"
    config.write_text("\n".join([
        f"input: {{paths: [{', '.join(str(p) for p in paths)}], variable: {variable}}}",
        f"modes: {{count: 10, noise_surrogates: {surrogates}}}",
        *extra,
        f"output: {{dir: {folder / 'out'}, figures: false}}",
    ]))
    return [CLIMODES, "run", "--quiet", str(config)]


def _median_of_3(command_for) -> tuple[float, float]:
    runs = [measured(command_for())[:2] for _ in range(3)]
    return statistics.median(r[0] for r in runs), statistics.median(r[1] for r in runs) / 1e9


def main() -> None:
    scratch = temporary_files_removed_at_exit()  # noqa: F841 (removed at exit)
    demo = [p for p in write_demo_fields(Path(tempfile.mkdtemp())) if p.name.startswith("sst")]
    fields = {"demo (600 x 1421)": (demo, "sst", ["select: {lat: [-80, 80]}", "prepare: {detrend: linear}"])}
    if "--demo-only" not in sys.argv:
        fields["monthly 1 degree (720 x 65,160)"] = (make_field("monthly_1deg", 720, 1.0, 6), "tas", [])
    print(f"{'field':<34} {'surrogates':>10} {'wall time':>10} {'peak memory':>12}")
    for name, (paths, variable, extra) in fields.items():
        for surrogates in (0, 100):
            seconds, gigabytes = _median_of_3(lambda: _config(paths, variable, surrogates, extra))
            print(f"{name:<34} {surrogates:>10} {seconds:>9.1f}s {gigabytes:>10.2f}GB", flush=True)


if __name__ == "__main__":
    main()
