"""Write the invented demo scenario into this folder (see climodes/demo.py for what it is)."""

from pathlib import Path

from climodes.demo import write_demo_fields

for path in write_demo_fields(Path(__file__).parent):
    print(f"wrote {path}")
