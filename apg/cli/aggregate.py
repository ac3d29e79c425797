"""``apg-aggregate``: summarise a multirun directory into a table and a plot (:mod:`apg.aggregate` computes,
:mod:`apg.reports.multirun_report` writes).

    apg-aggregate runs/multirun/2026-12-01_10-00-00               # writes summary.{csv,md,png} there
    apg-aggregate runs/multirun/2026-12-01_10-00-00 --out report --confidence 0.9
"""

from __future__ import annotations

import argparse
import sys
from pathlib import Path

from apg.reports.multirun_report import to_markdown, write_summary


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(prog="apg-aggregate", description="Held-out cost and success per setting of a "
                                 "multirun, across seeds: mean and Student-t confidence interval.")
    ap.add_argument("sweep_dir", type=Path, help="the multirun directory (hydra.sweep.dir)")
    ap.add_argument("--out", type=Path, default=None, help="where to write summary.{csv,md,png} (default: sweep_dir)")
    ap.add_argument("--confidence", type=float, default=0.95, help="two-sided confidence level (default 0.95)")
    args = ap.parse_args(argv)
    try:
        rows, paths = write_summary(args.sweep_dir, args.out, args.confidence)
    except (FileNotFoundError, ValueError) as e:
        print(f"apg-aggregate: {e}", file=sys.stderr)
        return 2
    sys.stdout.write(to_markdown(rows, args.confidence))
    print("wrote " + ", ".join(str(p) for p in paths), file=sys.stderr)
    return 0


if __name__ == "__main__":
    sys.exit(main())
