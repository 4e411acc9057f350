"""Start-up of the demo job with and without the on-disk K-correction table cache.

Each measurement is a fresh process (``python -c``) that loads the demo job and builds its
plan (every filter and SED read and checked, every K table built or read back): the work
``annotator run`` does before its first row. Three ways, each ``--repeat`` times, min and
median reported:

* ``cold``: an empty cache folder (the tables are built and stored: the first run);
* ``warm``: the same folder again (the tables are read back: every later run);
* ``off``: ``ANNOTATOR_KTABLE_CACHE=off`` (the tables are built and not stored: the
  competing approach, i.e. the code before the cache).

Printed: seconds in the K-correction plugin's configuration (the tables), for the whole plan
(timed inside the process, imports of the annotator and its cosmology excluded) and for the
whole process, and the ratios off / warm. Then one check that the warm plan's tables are
bit-identical to the cold plan's (the test suite checks this too).

    python benchmarks/bench_ktable_cache.py [--repeat 3]
"""

from __future__ import annotations

import argparse
import json
import os
import shutil
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

REPO = Path(__file__).resolve().parents[1]
JOB = REPO / "sample_catalogues" / "demo_job.toml"

CHILD = r"""
import hashlib, json, sys, time
t0 = time.perf_counter()
from annotator.config import load_job
from annotator.plan import build_plan
import annotator.cosmology  # imported by every plan: counted with the imports
from annotator_plugins.kcorrection import KCorrection
spent = []
real = KCorrection.configure.__func__
def timed(cls, setup):
    t = time.perf_counter()
    try:
        return real(cls, setup)
    finally:
        spent.append(time.perf_counter() - t)
KCorrection.configure = classmethod(timed)
t1 = time.perf_counter()
plan = build_plan(load_job(sys.argv[1], output_dir=sys.argv[2]))
t2 = time.perf_counter()
h = hashlib.sha256()
for a in (s.annotator for s in plan.steps):
    for b in getattr(a, "bands", []):
        if b.method is not None and hasattr(b.method, "table"):
            h.update(b.method.table.values.tobytes())
print(json.dumps({"imports_s": t1 - t0, "plan_s": t2 - t1, "kcorrection_s": sum(spent),
                  "tables_sha256": h.hexdigest()}))
"""


def one(cache: str, out: str) -> dict:
    env = dict(os.environ, ANNOTATOR_KTABLE_CACHE=cache)
    t = time.perf_counter()
    res = subprocess.run([sys.executable, "-c", CHILD, str(JOB), out], env=env, cwd=REPO,
                         capture_output=True, text=True, check=True)
    wall = time.perf_counter() - t
    data = json.loads(res.stdout.strip().splitlines()[-1])
    data["process_s"] = wall
    return data


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--repeat", type=int, default=3)
    args = ap.parse_args()
    tmp = Path(tempfile.mkdtemp(prefix="bench_ktable_"))
    out = str(tmp / "out")
    results: dict[str, list[dict]] = {"cold": [], "warm": [], "off": []}
    try:
        for _ in range(args.repeat):
            folder = tmp / "cache"
            shutil.rmtree(folder, ignore_errors=True)
            results["cold"].append(one(str(folder), out))
            results["warm"].append(one(str(folder), out))
            results["off"].append(one("off", out))
    finally:
        shutil.rmtree(tmp, ignore_errors=True)
    print(f"demo job start-up (plan built, before the first row), {args.repeat} runs each; "
          f"load average {os.getloadavg()[0]:.2f}")
    print(f"{'cache':6} {'K tables min':>12} {'med':>7} {'plan min':>9} {'med':>7} "
          f"{'process min':>12} {'med':>7}")
    summary = {}
    for k, rows in results.items():
        kt = [r["kcorrection_s"] for r in rows]
        plan = [r["plan_s"] for r in rows]
        proc = [r["process_s"] for r in rows]
        summary[k] = (min(kt), statistics.median(kt), min(plan), statistics.median(plan),
                      min(proc), statistics.median(proc))
        print(f"{k:6} {summary[k][0]:12.3f} {summary[k][1]:7.3f} {summary[k][2]:9.3f} "
              f"{summary[k][3]:7.3f} {summary[k][4]:12.3f} {summary[k][5]:7.3f}")
    print(f"ratio off / warm, K tables (min): {summary['off'][0] / summary['warm'][0]:.0f}x; "
          f"whole plan: {summary['off'][2] / summary['warm'][2]:.1f}x; warm plan "
          f"{'<' if summary['warm'][2] < 1.0 else '>='} 1 s")
    hashes = {r["tables_sha256"] for rows in results.values() for r in rows}
    print(f"tables bit-identical across cold, warm and off: {len(hashes) == 1}")
    return 0 if len(hashes) == 1 else 1


if __name__ == "__main__":
    raise SystemExit(main())
