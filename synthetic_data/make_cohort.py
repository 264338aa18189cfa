"""Write the synthetic demo cohort into synthetic_data/cohort/ (fixed seed); run from the repository root.

The scenario is invented (see synthetic_data/cohort/README.md and vesselgeom/demo.py).
"""

from __future__ import annotations

from pathlib import Path

from vesselgeom.demo import make_cohort

if __name__ == "__main__":
    manifest = make_cohort(Path(__file__).resolve().parent / "cohort")
    print(f"wrote {manifest}")
