"""Apply each deliberate bug of mutants.toml, one at a time, in a scratch copy; run its tests.

    python tests/mutation/run.py                 # every mutant (make mutate)
    python tests/mutation/run.py --only ID ...   # some of them
    python tests/mutation/run.py --list          # what is in the list
    python tests/mutation/run.py --check         # only check that every target is found

The working tree is never modified: the tree (without .git, .venv, caches) is copied to a
temporary folder, and the copy is what the tests import (PYTHONPATH points at it, with
``annotator_plugins`` pointing at its plugins/ folder, exactly as the editable install maps
it).  Before the mutants, the union of their tests runs once on the unmodified copy (the
baseline): a test that fails without a bug would make every mutant look caught.

Each mutant replaces one exact piece of text (``find``, which must occur exactly once in
its file, so a refactor that moves or changes the code is noticed) by ``replace``, runs only
its ``tests`` (pytest node ids or files, relative to the repository), and restores the file.
A mutant is *caught* when its tests fail, *survived* when they pass.  Exit status: 0 when
every mutant is caught; 1 when one survived, its target was not found (or not unique), or
the baseline failed.
"""

from __future__ import annotations

import argparse
import os
import shutil
import subprocess
import sys
import tempfile
import time
import tomllib
from pathlib import Path

HERE = Path(__file__).resolve().parent
REPO = HERE.parents[1]
LIST = HERE / "mutants.toml"
IGNORE = shutil.ignore_patterns(".git", ".venv", "__pycache__", "*.pyc", ".pytest_cache",
                                "demo_output", "build", "*.egg-info", ".ruff_cache")
TIMEOUT_S = 300


def load(path: Path = LIST) -> tuple[int, list[dict]]:
    try:
        data = tomllib.loads(path.read_text())
    except tomllib.TOMLDecodeError as exc:
        raise SystemExit(f"{path}: {exc}")
    mutants = data.get("mutant", [])
    seen = set()
    for m in mutants:
        for key in ("id", "file", "find", "replace", "tests", "why"):
            if key not in m:
                raise SystemExit(f"{path}: mutant {m.get('id', '?')!r} has no {key!r}")
        if m["id"] in seen:
            raise SystemExit(f"{path}: mutant id {m['id']!r} is listed twice")
        if m["find"] == m["replace"]:
            raise SystemExit(f"{path}: mutant {m['id']!r} replaces its text by itself")
        seen.add(m["id"])
    return int(data.get("version", 0)), mutants


def make_copy() -> tuple[Path, Path, dict]:
    scratch = Path(tempfile.mkdtemp(prefix="annotator-mutants-"))
    tree = scratch / "tree"
    shutil.copytree(REPO, tree, ignore=IGNORE, symlinks=True)
    shim = scratch / "path"
    shim.mkdir()
    (shim / "annotator").symlink_to(tree / "annotator")
    (shim / "annotator_plugins").symlink_to(tree / "plugins")
    env = dict(os.environ)
    env["PYTHONPATH"] = os.pathsep.join([str(shim), str(tree)])
    env["PYTHONDONTWRITEBYTECODE"] = "1"  # no stale bytecode between two mutants
    env.pop("PYTEST_ADDOPTS", None)
    probe = subprocess.run(
        [sys.executable, "-c", "import annotator, annotator_plugins; "
         "print(annotator.__file__); print(annotator_plugins.__file__)"],
        cwd=tree, env=env, capture_output=True, text=True)
    files = probe.stdout.split()
    if probe.returncode or len(files) != 2 or not all(f.startswith(str(scratch)) for f in files):
        shutil.rmtree(scratch, ignore_errors=True)
        raise SystemExit("mutation: the scratch copy is not what the tests would import "
                         f"({probe.stdout.strip()} {probe.stderr.strip()})")
    return scratch, tree, env


def pytest_cmd(tests: list[str]) -> list[str]:
    return [sys.executable, "-m", "pytest", "-q", "-x", "-p", "no:cacheprovider",
            "-p", "no:randomly", "-o", "addopts=", "-W", "ignore", *tests]


def run_tests(tree: Path, env: dict, tests: list[str]) -> tuple[str, float, str]:
    t0 = time.monotonic()
    try:
        proc = subprocess.run(pytest_cmd(tests), cwd=tree, env=env, capture_output=True,
                              text=True, timeout=TIMEOUT_S)
    except subprocess.TimeoutExpired:
        return "timeout", time.monotonic() - t0, ""
    tail = "\n".join((proc.stdout + proc.stderr).strip().splitlines()[-3:])
    # pytest: 0 all passed, 1 some failed; anything else (collection error, usage) is
    # reported as an error, never as caught
    status = {0: "passed", 1: "failed"}.get(proc.returncode, f"error({proc.returncode})")
    return status, time.monotonic() - t0, tail


def check_targets(tree: Path, mutants: list[dict]) -> list[str]:
    problems = []
    for m in mutants:
        path = tree / m["file"]
        if not path.is_file():
            problems.append(f"{m['id']}: file {m['file']} not found")
            continue
        n = path.read_text().count(m["find"])
        if n != 1:
            problems.append(f"{m['id']}: target text found {n} times in {m['file']} "
                            "(expected exactly once)")
        for t in m["tests"]:
            if not (tree / t.split("::")[0]).exists():
                problems.append(f"{m['id']}: test {t} not found")
    return problems


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--only", nargs="+", metavar="ID", help="run only these mutants")
    ap.add_argument("--list", action="store_true", help="list the mutants and exit")
    ap.add_argument("--check", action="store_true",
                    help="only check that every target is found exactly once")
    ap.add_argument("--no-baseline", action="store_true",
                    help="skip the run of the tests on the unmodified copy")
    args = ap.parse_args(argv)
    version, mutants = load()
    if args.only:
        unknown = set(args.only) - {m["id"] for m in mutants}
        if unknown:
            print(f"mutation: unknown mutant id(s): {', '.join(sorted(unknown))}",
                  file=sys.stderr)
            return 2
        mutants = [m for m in mutants if m["id"] in args.only]
    if args.list:
        for m in mutants:
            print(f"{m['id']:<34} {m['file']}  -- {m['why']}")
        print(f"{len(mutants)} mutants (list version {version})")
        return 0

    scratch, tree, env = make_copy()
    try:
        problems = check_targets(tree, mutants)
        for p in problems:
            print(f"MISSING   {p}")
        if args.check or problems:
            print(f"mutation: {len(problems)} target problem(s) in {len(mutants)} mutants")
            return 1 if problems else 0
        print(f"mutation list version {version}: {len(mutants)} mutants; scratch copy {tree}")
        if not args.no_baseline:
            union = sorted({t for m in mutants for t in m["tests"]})
            status, secs, tail = run_tests(tree, env, union)
            print(f"baseline  {status:<8} {secs:6.1f}s  ({len(union)} test targets, no bug)")
            if status != "passed":
                print(tail)
                print("mutation: the tests fail without any bug; fix them first")
                return 1
        results = []
        for m in mutants:
            path = tree / m["file"]
            original = path.read_text()
            path.write_text(original.replace(m["find"], m["replace"], 1))
            try:
                status, secs, tail = run_tests(tree, env, m["tests"])
            finally:
                path.write_text(original)
            verdict = {"failed": "caught", "timeout": "caught", "passed": "SURVIVED"}.get(
                status, "ERROR")
            results.append((m["id"], verdict))
            note = " (timeout)" if status == "timeout" else ""
            print(f"{verdict:<9} {m['id']:<34} {secs:6.1f}s{note}", flush=True)
            if verdict == "ERROR":
                print("          " + tail.replace("\n", "\n          "))
        caught = sum(v == "caught" for _, v in results)
        bad = [i for i, v in results if v != "caught"]
        print(f"mutation: {caught} caught, {len(bad)} not caught, of {len(results)} mutants"
              + (f" -- not caught: {', '.join(bad)}" if bad else ""))
        return 1 if bad else 0
    finally:
        shutil.rmtree(scratch, ignore_errors=True)


if __name__ == "__main__":
    sys.exit(main())
