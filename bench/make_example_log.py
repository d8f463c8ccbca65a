"""Write scenarios/logs/example-run.csv, the shipped example log of `gradfence advise`.

The log is of our own invention (core.synthetic_log): 3000 steps whose batch size doubles from 32
to 64 halfway, a second norm on a sub-batch of 8 every 4th step, eight spikes and two non-finite
norms. Run it again after changing the process; the file is committed.
"""

from __future__ import annotations

import sys
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent.parent))

from core.synthetic_log import SyntheticRun, generate, write_csv

ROOT = Path(__file__).resolve().parent.parent
EXAMPLE = SyntheticRun(rows=3000, small_every=4, seed=15)
OUT = ROOT / "scenarios" / "logs" / "example-run.csv"


def main() -> None:
    write_csv(OUT, generate(EXAMPLE), digits=6)
    print(f"wrote {OUT.relative_to(ROOT)}")


if __name__ == "__main__":
    main()
