"""CSV input: ``annotator run`` on a CSV against its floor, pyarrow's CSV reader alone.

Measured in one run, each in its own process (wall and CPU seconds, peak RSS of that
process), best of ``--repeat``:

* **floor**: ``pyarrow.csv.open_csv`` streaming over the file with its own type inference, no
  annotation, no output (the cost of reading the CSV at all);
* **csv run**: ``annotator run`` on the CSV with the default typing (the job's numeric inputs as
  float64, every other column typed over the whole file in a first pass);
* **csv run, types given**: the same with ``[input].column_types`` naming every other column
  (no first pass);
* **parquet run**: ``annotator run`` on the same rows stored as Parquet (what the run costs
  beyond reading its input);
* optionally **old reader** (``--old-tree DIR``: a checkout of an earlier commit, run with
  that folder first on the import path), e.g. ``git archive 7ffa072 | tar -x -C /tmp/old``.

Ratios printed: run / floor, and the CSV part of the run, (csv run - parquet run) / floor.
Peak RSS at two sizes shows whether memory grows with the file.

    python benchmarks/bench_csv.py                       # 2 000 000 rows (make bench)
    python benchmarks/bench_csv.py --rows 200000 --repeat 1   # quick
"""

from __future__ import annotations

import argparse
import os
import shutil
import subprocess
import sys
from pathlib import Path

from _common import DATA, OUT, annotator_cmd, synthetic_catalogue
from _common import measured as common_measured

FLOOR = ("import sys, pyarrow.csv as c\n"
         "n = 0\n"
         "for b in c.open_csv(sys.argv[1], read_options=c.ReadOptions(block_size=8 << 20)):\n"
         "    n += b.num_rows\n"
         "print(n)\n")
PASS_THROUGH_TYPES = {"objid": "int64", "ra": "float64", "dec": "float64",
                      **{f"mag_{b}": "float64" for b in "ugriz"}}


def measured(cmd: list[str]) -> tuple[float, float, float]:
    """(wall s, CPU s, peak RSS MiB) of one child process (benchmarks/_common.measured)."""
    wall, peak, cpu = common_measured(cmd, cpu=True)
    return wall, cpu, peak


OLD_TREE_MAIN = ("import importlib.util, sys\n"
                 "tree = sys.argv.pop(1)\n"
                 "spec = importlib.util.spec_from_file_location(\n"
                 "    'annotator', tree + '/annotator/__init__.py',\n"
                 "    submodule_search_locations=[tree + '/annotator'])\n"
                 "mod = importlib.util.module_from_spec(spec)\n"
                 "sys.modules['annotator'] = mod\n"
                 "spec.loader.exec_module(mod)\n"
                 "from annotator.cli import main\n"
                 "import annotator.io.readers as r\n"
                 "assert r.__file__.startswith(tree), r.__file__\n"
                 "sys.exit(main(sys.argv[1:]))\n")


def run_job(src: Path, out: Path, *, types: bool = False, old_tree: Path | None = None):
    if out.exists():
        shutil.rmtree(out)
    args = ["run", str(src), "--out", str(out), "--quiet"]
    if types:
        job = out.with_suffix(".toml")
        pairs = ", ".join(f'{k} = "{v}"' for k, v in PASS_THROUGH_TYPES.items())
        job.write_text(f"[input]\ncolumn_types = {{ {pairs} }}\n")
        args += ["--config", str(job)]
    if old_tree is None:
        cmd = annotator_cmd(*args)
    else:
        cmd = [sys.executable, "-c", OLD_TREE_MAIN, str(old_tree.resolve()), *args]
    result = measured(cmd)
    shutil.rmtree(out)
    return result


BREAKDOWN = """
import resource, sys
from pathlib import Path
import pyarrow.csv as c
from annotator.io.csv import CsvReader
from annotator.io.readers import expand_inputs

def cpu():
    u = resource.getrusage(resource.RUSAGE_SELF)
    return u.ru_utime + u.ru_stime

src = expand_inputs([Path(sys.argv[1])])[0]
t = cpu(); reader = CsvReader(src); opened = cpu() - t
t = cpu(); schema = reader.resolve_types({"z", "z_err"}); first = cpu() - t
t = cpu()
for chunk in reader.chunks(250_000, target=schema):
    pass
main = cpu() - t
peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
t = cpu()
for b in c.open_csv(sys.argv[1], read_options=c.ReadOptions(block_size=8 << 20)):
    pass
floor = cpu() - t
print(f"reader only, CPU s: open (header + 4 MiB type sample) {opened:.2f}, first pass "
      f"(types of the 8 columns no annotator reads) {first:.2f}, main pass (clean + typed "
      f"parse + chunking) {main:.2f}; pyarrow alone {floor:.2f}; reader total / floor "
      f"{(opened + first + main) / floor:.2f}x; peak RSS of the reader alone {peak:.0f} MiB")
"""


def breakdown(csv: Path) -> None:
    """Where the reader's time goes, in one process (CPU seconds)."""
    proc = subprocess.run([sys.executable, "-c", BREAKDOWN, str(csv)], capture_output=True,
                          text=True)
    if proc.returncode:
        raise RuntimeError(proc.stderr[-2000:])
    print(proc.stdout.strip())


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--rows", type=int, default=2_000_000)
    ap.add_argument("--repeat", type=int, default=3)
    ap.add_argument("--old-tree", type=Path, default=None,
                    help="also time the annotator code in this folder (an earlier checkout)")
    ap.add_argument("--breakdown-only", action="store_true",
                    help="only the in-process CPU breakdown of the reader")
    args = ap.parse_args()
    if args.breakdown_only:
        breakdown(synthetic_catalogue(DATA / f"bench_{args.rows}.csv", args.rows, fmt="csv"))
        return 0
    sizes = sorted({max(args.rows // 4, 1000), args.rows})
    print(f"load average before: {os.getloadavg()[0]:.2f} (2 cores shared: compare CPU "
          f"seconds when it is high)")
    results: dict[tuple[str, int], tuple[float, float, float]] = {}
    for rows in sizes:
        csv = synthetic_catalogue(DATA / f"bench_{rows}.csv", rows, fmt="csv")
        parquet = synthetic_catalogue(DATA / f"bench_{rows}.parquet", rows)
        repeat = args.repeat if rows == args.rows else 1
        cases = {
            "floor: pyarrow CSV reader alone": lambda: measured(
                [sys.executable, "-c", FLOOR, str(csv)]),
            "csv run (default typing)": lambda: run_job(csv, OUT / "csv_bench"),
            "csv run (column_types given)": lambda: run_job(csv, OUT / "csv_bench", types=True),
            "parquet run (same rows)": lambda: run_job(parquet, OUT / "csv_bench"),
        }
        if args.old_tree is not None:
            cases["csv run, old reader (--old-tree)"] = \
                lambda: run_job(csv, OUT / "csv_bench", old_tree=args.old_tree)
        for name, fn in cases.items():
            best = None
            for _ in range(repeat):
                r = fn()
                best = r if best is None else tuple(min(a, b) for a, b in zip(best, r))
            results[(name, rows)] = best
    rows = args.rows
    floor = results[("floor: pyarrow CSV reader alone", rows)]
    parquet = results[("parquet run (same rows)", rows)]
    print(f"\n{rows:,} rows, {(DATA / f'bench_{rows}.csv').stat().st_size / 1e6:.0f} MB of CSV; "
          f"best of {args.repeat}")
    print(f"{'':36} {'wall s':>7} {'CPU s':>7} {'rows/s':>11} {'peak MiB':>9} "
          f"{'wall/floor':>10} {'CPU/floor':>9}")
    for (name, n), (wall, cpu, peak) in results.items():
        if n != rows:
            continue
        print(f"{name:36} {wall:7.2f} {cpu:7.2f} {rows / wall:11,.0f} {peak:9.0f} "
              f"{wall / floor[0]:10.2f} {cpu / floor[1]:9.2f}")
    for name in ("csv run (default typing)", "csv run (column_types given)",
                 "csv run, old reader (--old-tree)"):
        if (name, rows) not in results:
            continue
        wall, cpu, _ = results[(name, rows)]
        print(f"CSV part of '{name}' = (run - parquet run) / floor: "
              f"wall {(wall - parquet[0]) / floor[0]:.2f}x, CPU {(cpu - parquet[1]) / floor[1]:.2f}x"
              f"  (target <= 1.3x)")
    if len(sizes) > 1:
        small = sizes[0]
        for name in ("csv run (default typing)", "floor: pyarrow CSV reader alone"):
            print(f"peak RSS {name}: {results[(name, small)][2]:.0f} MiB at {small:,} rows, "
                  f"{results[(name, rows)][2]:.0f} MiB at {rows:,} rows")
    breakdown(DATA / f"bench_{rows}.csv")
    print(f"load average after: {os.getloadavg()[0]:.2f}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
