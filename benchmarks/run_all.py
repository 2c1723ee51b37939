"""Run every benchmark in this folder (``bench_*.py``) and print their tables.

Run: ``python benchmarks/run_all.py``. Figures are ratios against reference
libraries measured in the same run; absolute times depend on the machine.
"""

from __future__ import annotations

import importlib.util
import sys
from pathlib import Path

HERE = Path(__file__).resolve().parent


def main() -> None:
    sys.path.insert(0, str(HERE))
    for path in sorted(HERE.glob("bench_*.py")):
        spec = importlib.util.spec_from_file_location(path.stem, path)
        assert spec is not None and spec.loader is not None
        module = importlib.util.module_from_spec(spec)
        spec.loader.exec_module(module)
        print(f"\n=== {path.stem} ===", flush=True)
        module.main()


if __name__ == "__main__":
    main()
