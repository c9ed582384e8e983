"""On-demand benchmark of ``build_report`` (not collected by pytest: not named test_*).

Run from the repository root:

    python tests/bench/bench_report.py                 # 200 units x 63 days, 10-min windows
    python tests/bench/bench_report.py --units 50 --backend memory

Builds a synthetic lake of derived tables matching fleetwatch/schema.py (tests/report_lake.py:
windows and efficiency at 10-minute windows, unit_days, events, fits, scores, trends, health,
quarantine) and times one weekly report for it. ``--backend delta`` (default when
fleetwatch.lake exists) writes the tables into a real Delta lake with Lake.overwrite;
``memory`` serves them from Arrow tables in memory. Prints the wall-clock seconds of each
stage and fails (exit 1) above the target: 30 s for 200 units on 2 cores.
"""
from __future__ import annotations

import argparse
import datetime as dt
import importlib.util
import json
import os
import resource
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[2]
sys.path.insert(0, str(ROOT))
sys.path.insert(0, str(ROOT / "tests"))

from fleetwatch.config import load_settings  # noqa: E402
from fleetwatch.report import build_report  # noqa: E402
from report_lake import FrameLake, synthetic_tables, write_lake  # noqa: E402

TARGET_S = 30.0


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--units", type=int, default=200)
    ap.add_argument("--days", type=int, default=63)
    ap.add_argument("--window-min", type=int, default=10)
    ap.add_argument("--backend", choices=["delta", "memory"],
                    default="delta" if importlib.util.find_spec("fleetwatch.lake") else "memory")
    ap.add_argument("--pdf", action="store_true", help="also print the PDF")
    ap.add_argument("--target-s", type=float, default=TARGET_S)
    ap.add_argument("--json", action="store_true", help="print the figures as JSON")
    args = ap.parse_args(argv)

    t = time.perf_counter()
    tables, truth = synthetic_tables(units=args.units, days=args.days,
                                     window_min=args.window_min)
    build_s = time.perf_counter() - t
    with tempfile.TemporaryDirectory(prefix="fw-bench-report-") as tmp:
        settings = load_settings(tmp, env={})
        t = time.perf_counter()
        if args.backend == "delta":
            lake = write_lake(settings.lake_path, tables)
        else:
            lake = FrameLake(tables)
        lake_s = time.perf_counter() - t
        now = dt.datetime.combine(truth.start + dt.timedelta(days=args.days),
                                  dt.time(6), tzinfo=dt.timezone.utc)
        t = time.perf_counter()
        res = build_report(settings, week=truth.report_week, pdf=args.pdf, lake=lake, now=now)
        report_s = time.perf_counter() - t
        html_mb = res.paths["html"].stat().st_size / 1e6
    out = {
        "units": args.units, "days": args.days, "window_min": args.window_min,
        "backend": args.backend, "rows_windows": tables["windows"].height,
        "units_needing_action": len(res.summary["units_needing_action"]),
        "evidence_units": min(len(res.summary["units_needing_action"]),
                              int(settings.report_units_max)),
        "synthetic_build_s": round(build_s, 2), "lake_write_s": round(lake_s, 2),
        "report_s": round(report_s, 2),
        "stages_s": {k: round(v, 2) for k, v in res.timings_s.items()},
        "html_mb": round(html_mb, 2),
        "peak_rss_mb": round(resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024, 0),
        "load_avg_1min": round(os.getloadavg()[0], 2), "cpus": os.cpu_count(),
        "target_s": args.target_s,
    }
    if args.json:
        print(json.dumps(out, indent=2))
    else:
        print(f"report for {args.units} units ({out['evidence_units']} with evidence charts, "
              f"{out['units_needing_action']} needing action): {report_s:.1f} s "
              f"(target {args.target_s:.0f} s); stages {out['stages_s']}; "
              f"html {html_mb:.1f} MB; peak RSS {out['peak_rss_mb']:.0f} MB; "
              f"load avg {out['load_avg_1min']} on {out['cpus']} CPUs; "
              f"[lake {args.backend}: {out['rows_windows']:,} window rows written in "
              f"{lake_s:.1f} s]")
    return 0 if report_s <= args.target_s else 1


if __name__ == "__main__":
    sys.exit(main())
