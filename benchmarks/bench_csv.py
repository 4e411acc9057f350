"""CSV input: ``annotator run`` on a CSV against its floor, pyarrow's CSV reader alone.

Measured in one run, each in its own process (wall and CPU seconds, peak RSS of that
process), best of ``--repeat``:

* **floor**: ``pyarrow.csv.open_csv`` streaming over the file with its own type inference, no
  annotation, no output (the cost of reading the CSV at all), with its threads and with one
  thread; the ratios use the cheaper of the two in CPU;
* **reader alone**: annotator's ``CsvReader`` typing the file and cutting it into chunks (no
  annotation, no output), as the plan and the engine use it;
* **csv run**: ``annotator run`` on the CSV with the default typing (the job's numeric inputs as
  float64, every other column typed over the whole file in a first pass);
* **csv run, types given**: the same with ``[input].column_types`` naming every other column
  (no first pass);
* **parquet run**: ``annotator run`` on the same rows stored as Parquet (what the run costs
  beyond reading its input);
* optionally **old reader** (``--old-tree DIR``: a checkout of an earlier commit, run with
  that folder first on the import path), e.g. ``git archive 7ffa072 | tar -x -C /tmp/old``.

Ratios printed: reader alone / floor and run / floor (the lines starting READER ALONE and
WHOLE RUN), and the CSV part of the run, (csv run - parquet run) / floor.
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
         "for b in c.open_csv(sys.argv[1], read_options=c.ReadOptions(block_size=8 << 20,\n"
         "                    use_threads=sys.argv[2] == 'threads')):\n"
         "    n += b.num_rows\n"
         "print(n)\n")
# annotator's CSV reader alone, as the plan and the engine use it (the numeric inputs of the
# benchmark's default job are more than z and z_err; fewer numeric columns leave more to type)
READER = ("import sys\n"
          "from pathlib import Path\n"
          "from annotator.io.csv import CsvReader\n"
          "from annotator.io.readers import expand_inputs\n"
          "src = expand_inputs([Path(sys.argv[1])])[0]\n"
          "reader = CsvReader(src)\n"
          "schema = reader.resolve_types({'z', 'z_err'})\n"
          "n = sum(c.table.num_rows for c in CsvReader(src).chunks(250_000, target=schema))\n"
          "print(n)\n")
FLOOR_THREADS = "floor: pyarrow CSV reader alone"
FLOOR_ONE = "floor: pyarrow CSV reader, 1 thread"
READER_ALONE = "annotator's CSV reader alone"
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
floors = []
for threads in (True, False):
    t = cpu()
    for b in c.open_csv(sys.argv[1], read_options=c.ReadOptions(block_size=8 << 20,
                                                                 use_threads=threads)):
        pass
    floors.append(cpu() - t)
floor = min(floors)
print(f"reader only, CPU s: open (header + 4 MiB type sample) {opened:.2f}, first pass "
      f"(types of the 8 columns no annotator reads; parses every block and keeps its rows) "
      f"{first:.2f}, main pass (reads the kept rows back + chunking) {main:.2f}; pyarrow "
      f"alone {floors[0]:.2f} (its threads) / {floors[1]:.2f} (1 thread); reader total / "
      f"cheaper floor {(opened + first + main) / floor:.2f}x; peak RSS of the reader alone "
      f"{peak:.0f} MiB")
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
            FLOOR_THREADS: lambda: measured([sys.executable, "-c", FLOOR, str(csv), "threads"]),
            FLOOR_ONE: lambda: measured([sys.executable, "-c", FLOOR, str(csv), "one"]),
            READER_ALONE: lambda: measured([sys.executable, "-c", READER, str(csv)]),
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
    # the competing approach: pyarrow's reader alone, the cheaper (in CPU) of its two ways
    floor = min(results[(FLOOR_THREADS, rows)], results[(FLOOR_ONE, rows)], key=lambda r: r[1])
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
    print(f"(floor = the cheaper in CPU of the two pyarrow rows: {floor[1]:.2f} s CPU)")
    reader = results[(READER_ALONE, rows)]
    print(f"READER ALONE: annotator {reader[1]:.2f} s CPU against pyarrow alone {floor[1]:.2f} s "
          f"CPU, same run: {reader[1] / floor[1]:.2f}x (wall {reader[0] / floor[0]:.2f}x; "
          f"target <= 1.3x)")
    for name in ("csv run (default typing)", "csv run (column_types given)"):
        run = results[(name, rows)]
        print(f"WHOLE RUN, {name}: {run[1]:.2f} s CPU against pyarrow alone {floor[1]:.2f} s "
              f"CPU: {run[1] / floor[1]:.2f}x (wall {run[0] / floor[0]:.2f}x)")
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
        for name in (READER_ALONE, "csv run (default typing)", FLOOR_THREADS, FLOOR_ONE):
            print(f"peak RSS {name}: {results[(name, small)][2]:.0f} MiB at {small:,} rows, "
                  f"{results[(name, rows)][2]:.0f} MiB at {rows:,} rows")
    breakdown(DATA / f"bench_{rows}.csv")
    print(f"load average after: {os.getloadavg()[0]:.2f}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
