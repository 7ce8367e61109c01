"""``python -m benchmarks.label_efficiency`` (from the repository root)."""

import sys
from pathlib import Path

REPO = Path(__file__).resolve().parents[2]
if str(REPO) not in sys.path:  # also runnable as ``python benchmarks/label_efficiency``
    sys.path.insert(0, str(REPO))

from benchmarks.label_efficiency.cli import main  # noqa: E402

if __name__ == "__main__":
    raise SystemExit(main())
