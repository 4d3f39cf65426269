"""Long fuzz run: the property tests of tests/test_fuzz.py with many more cases.

Run:  python bench/fuzz.py [CASES_PER_PROPERTY]   (default 500; random seeds each run)

Prints how many cases each generator tried and exits non-zero if any property failed.
"""

from __future__ import annotations

import os
import sys
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent


def main() -> int:
    cases = sys.argv[1] if len(sys.argv) > 1 else "500"
    os.environ["ROOFGATE_FUZZ_EXAMPLES"] = cases
    os.environ["ROOFGATE_FUZZ_RANDOM"] = "1"
    import pytest

    code = pytest.main([str(ROOT / "tests" / "test_fuzz.py"), "-q", "-p", "no:cacheprovider"])
    test_fuzz = sys.modules["test_fuzz"]  # imported by pytest; it counted the cases it tried
    for name, count in sorted(test_fuzz.CASES.items()):
        print(f"fuzz: {count} cases of {name}")
    print(f"fuzz: {sum(test_fuzz.CASES.values())} cases tried in all")
    return int(code)


if __name__ == "__main__":
    raise SystemExit(main())
