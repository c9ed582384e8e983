"""On-demand benchmark of ``simulate_fleet`` (not collected by pytest: not named test_*).

Run from the repository root:

    python tests/bench/bench_simulate.py                  # default fleet: 24 units x 120 d, 60 s
    python tests/bench/bench_simulate.py --units 48 --days 60

Prints wall-clock seconds, telemetry rows written, rows per second and the peak resident
set size of this process (resource.getrusage; ru_maxrss is in KiB on Linux). Target for the
default fleet: under 60 s on 2 cores. Files go to a temporary folder unless --out is given.
"""
from __future__ import annotations

import argparse
import json
import resource
import sys
import tempfile
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parents[2]))

from fleetwatch.simulate import (DEFAULT_DAYS, DEFAULT_PERIOD_S, DEFAULT_SEED,  # noqa: E402
                                 DEFAULT_START, DEFAULT_UNITS, simulate_fleet)


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--units", type=int, default=DEFAULT_UNITS)
    ap.add_argument("--days", type=int, default=DEFAULT_DAYS)
    ap.add_argument("--period-s", type=float, default=DEFAULT_PERIOD_S)
    ap.add_argument("--seed", type=int, default=DEFAULT_SEED)
    ap.add_argument("--start", default=DEFAULT_START)
    ap.add_argument("--out", type=Path, default=None, help="keep the files in this folder")
    ap.add_argument("--json", action="store_true", help="print one JSON object")
    args = ap.parse_args(argv)

    with tempfile.TemporaryDirectory(prefix="fleetwatch-bench-") as tmp:
        out = args.out or Path(tmp) / "fleet"
        t0 = time.perf_counter()
        res = simulate_fleet(out, units=args.units, days=args.days, period_s=args.period_s,
                             seed=args.seed, start=args.start)
        seconds = time.perf_counter() - t0
        size_mb = sum(f.stat().st_size for f in res.files) / 1e6
    peak_mb = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0
    result = {"units": args.units, "days": args.days, "period_s": args.period_s,
              "seconds": round(seconds, 2), "rows": res.rows,
              "rows_per_s": round(res.rows / seconds), "peak_rss_mb": round(peak_mb, 1),
              "output_mb": round(size_mb, 1), "files": len(res.files)}
    if args.json:
        print(json.dumps(result))
    else:
        print(f"simulate_fleet: {args.units} units x {args.days} d at {args.period_s:g} s")
        print(f"  seconds    {seconds:10.2f}")
        print(f"  rows       {res.rows:10,d}")
        print(f"  rows/s     {res.rows / seconds:10,.0f}")
        print(f"  peak RSS   {peak_mb:10.1f} MB")
        print(f"  output     {size_mb:10.1f} MB in {len(res.files)} files")
    return 0


if __name__ == "__main__":
    sys.exit(main())
