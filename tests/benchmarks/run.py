"""Benchmark runner: ``python tests/benchmarks/run.py [NAME ...]``.

Every benchmark measures our code and a reference side by side in the same run and prints
ratios, so the numbers mean the same on a fast or a slow machine. Not collected by pytest
(file names do not start with ``test_``). Each ``bench_<name>.py`` module has ``main()``
returning a list of rows ``(name, ours_s, reference_s, ratio, goal, ok)``.
"""

from __future__ import annotations

import importlib
import os
import sys
import time
from pathlib import Path

HERE = Path(__file__).resolve().parent
ORDER = ["startup", "companions", "fit", "run", "maps", "noise", "runs", "sweep", "gui"]


def _print_rows(rows) -> None:
    head = ("benchmark", "ours", "reference", "ratio", "goal", "ok")
    table = [head] + [
        (
            str(r[0]),
            f"{r[1] * 1e3:.3f} ms" if r[1] is not None else "-",
            f"{r[2] * 1e3:.3f} ms" if r[2] is not None else "-",
            f"{r[3]:.3g}" if r[3] is not None else "-",
            str(r[4]),
            "yes" if r[5] else ("-" if r[5] is None else "NO"),
        )
        for r in rows
    ]
    widths = [max(len(row[i]) for row in table) for i in range(len(head))]
    for n, row in enumerate(table):
        print(
            "  ".join(
                c.ljust(w) if i == 0 else c.rjust(w) for i, (c, w) in enumerate(zip(row, widths))
            )
        )
        if n == 0:
            print("  ".join("-" * w for w in widths))


def main(argv: list[str] | None = None) -> int:
    os.environ.setdefault("QT_QPA_PLATFORM", "offscreen")
    sys.path.insert(0, str(HERE))
    names = argv if argv else [n for n in ORDER if (HERE / f"bench_{n}.py").exists()]
    unknown = [n for n in names if not (HERE / f"bench_{n}.py").exists()]
    if unknown:
        known = ", ".join(sorted(p.stem[6:] for p in HERE.glob("bench_*.py")))
        print(
            f"run.py: no benchmark named {', '.join(unknown)}; choose from {known}", file=sys.stderr
        )
        return 2
    all_ok = True
    for name in names:
        mod = importlib.import_module(f"bench_{name}")
        print(f"\n== {name}")
        t0 = time.perf_counter()
        rows = mod.main()
        _print_rows(rows)
        print(f"({time.perf_counter() - t0:.1f} s)")
        all_ok &= all(r[5] is not False for r in rows)
    return 0 if all_ok else 1


if __name__ == "__main__":
    sys.exit(main(sys.argv[1:]))
