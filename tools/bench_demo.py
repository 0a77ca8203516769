#!/usr/bin/env python3
"""Run time of ``warmstart demo``: seconds per stage and in total, against the targets.

Targets (2 CPU cores, no GPU): ``--quick`` under 150 s, the default under 480 s; with ``--3d``,
``--3d --quick`` under 360 s and ``--3d`` under 1200 s. Each variant runs in a fresh temporary
folder, so nothing is reused.

Usage: python tools/bench_demo.py [--3d] [--full] [--keep DIR]
"""
from __future__ import annotations

import argparse
import os
import shutil
import tempfile
from pathlib import Path

TARGETS = {"quick": 150.0, "default": 480.0, "3d-quick": 360.0, "3d": 1200.0}


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--full", action="store_true", help="also run the default demo (about 8 minutes; 3-D: under 20)")
    ap.add_argument("--3d", dest="three_d", action="store_true", help="the 3-D variants")
    ap.add_argument("--keep", metavar="DIR", help="keep the demo folders under DIR")
    args = ap.parse_args()
    from warmstart.demo.run import run_demo

    print(f"cores available: {len(os.sched_getaffinity(0))}")
    names = ("quick", "default") if args.full else ("quick",)
    if args.three_d:
        names = tuple("3d" if n == "default" else "3d-quick" for n in names)
    for name in names:
        root = Path(args.keep) / name if args.keep else Path(tempfile.mkdtemp(prefix=f"bench-demo-{name}-"))
        try:
            result = run_demo(root, quick=name.endswith("quick"), dims=3 if args.three_d else 2, progress=False,
                              echo=lambda _line: None)
        finally:
            if not args.keep:
                shutil.rmtree(root, ignore_errors=True)
        stages = ", ".join(f"{k} {v:.0f} s" for k, v in result["stage_seconds"].items())
        verdict = "within" if result["seconds"] <= TARGETS[name] else "OVER"
        print(f"demo {name}: {result['seconds']:.0f} s total ({verdict} the {TARGETS[name]:.0f} s target); {stages}")


if __name__ == "__main__":
    main()
