"""The README and the docs pages say what the tool does: their runnable examples are run.

A fenced block preceded by the line ``<!-- docs-test -->`` is runnable:

* a ```` ```sh ```` block runs as one shell script (``bash -e``) and must exit 0;
* a ```` ```console ```` block holds ``$ command`` lines, each followed by the output the
  documentation states. The command runs, and its output (stdout and stderr together, in the
  order written) must match the stated lines: a line ``...`` stands for any number of lines,
  ``...`` inside a line for any text (run times, rates). Every count, flag total and figure
  shown in such a block is therefore read from the documentation text and compared with what
  the tool prints: when a change moves a number, the test names the page and the line, and
  only the documentation needs editing.

Each page runs in its own scratch folder holding a link to ``sample_catalogues/`` and an
annotated ``demo_output/`` of the demo job, with the venv's ``bin/`` first on ``PATH``
(consistency checks: the tool against its own documentation).
"""

from __future__ import annotations

import os
import re
import shutil
import subprocess
import sys
from dataclasses import dataclass
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[2]
MARKER = "<!-- docs-test -->"
TIMEOUT_S = 120


@dataclass
class Block:
    page: str
    line: int          # 1-based line of the opening fence
    kind: str          # "sh" or "console"
    text: str


def runnable_blocks(path: Path) -> list[Block]:
    lines = path.read_text().split("\n")
    blocks = []
    i = 0
    while i < len(lines):
        if lines[i].strip() == MARKER:
            j = i + 1
            while j < len(lines) and not lines[j].strip():
                j += 1
            fence = re.match(r"```(sh|console)\s*$", lines[j]) if j < len(lines) else None
            if not fence:
                raise AssertionError(f"{path.name}:{i + 1}: {MARKER} must precede a ```sh or "
                                     f"```console block")
            k = j + 1
            while k < len(lines) and lines[k].strip() != "```":
                k += 1
            blocks.append(Block(path.name, j + 1, fence.group(1), "\n".join(lines[j + 1:k])))
            i = k
        i += 1
    return blocks


def console_steps(block: Block) -> list[tuple[str, list[str]]]:
    steps: list[tuple[str, list[str]]] = []
    for raw in block.text.split("\n"):
        if raw.startswith("$ "):
            steps.append((raw[2:], []))
        elif steps:
            steps[-1][1].append(raw)
        elif raw.strip():
            raise AssertionError(f"{block.page}:{block.line}: output before any '$ ' command")
    return steps


def _line_pattern(expected: str) -> str:
    return ".*".join(re.escape(part) for part in expected.rstrip().split("...")) + r"\s*"


def output_matches(expected: list[str], actual: list[str]) -> bool:
    """``expected`` against ``actual``; ``...`` alone = any lines, inside a line = any text."""
    while expected and not expected[-1].strip():
        expected = expected[:-1]
    pattern = ""
    for line in expected:
        if line.strip() == "...":
            pattern += r"(?:[^\n]*\n)*?"
        else:
            pattern += _line_pattern(line) + r"\n"
    text = "\n".join(a.rstrip() for a in actual).rstrip("\n") + "\n"
    return re.fullmatch(pattern, text) is not None


def _env() -> dict:
    env = dict(os.environ)
    env["PATH"] = str(Path(sys.executable).parent) + os.pathsep + env.get("PATH", "")
    env["PYTHONUNBUFFERED"] = "1"
    env.pop("ANNOTATOR_DEBUG", None)
    return env


def _shell(script: str, cwd: Path) -> subprocess.CompletedProcess:
    return subprocess.run(["bash", "-e", "-c", script], cwd=cwd, env=_env(), text=True,
                          stdin=subprocess.DEVNULL, stdout=subprocess.PIPE,
                          stderr=subprocess.STDOUT, timeout=TIMEOUT_S)


@pytest.fixture(scope="module")
def demo_output(tmp_path_factory) -> Path:
    base = tmp_path_factory.mktemp("docs_demo")
    (base / "sample_catalogues").symlink_to(ROOT / "sample_catalogues")
    done = _shell("annotator run --config sample_catalogues/demo_job.toml --out demo_output "
                  "--quiet", base)
    assert done.returncode == 0, done.stdout
    return base / "demo_output"


def _sandbox(tmp_path: Path, demo_output: Path) -> Path:
    (tmp_path / "sample_catalogues").symlink_to(ROOT / "sample_catalogues")
    shutil.copytree(demo_output, tmp_path / "demo_output")
    return tmp_path


def run_page(page: Path, cwd: Path) -> list[str]:
    """Run every runnable block of ``page`` in order; return the problems found."""
    problems = []
    for block in runnable_blocks(page):
        where = f"{block.page}:{block.line}"
        if block.kind == "sh":
            done = _shell(block.text, cwd)
            if done.returncode != 0:
                problems.append(f"{where}: exit {done.returncode}\n{done.stdout}")
            continue
        for command, expected in console_steps(block):
            done = _shell(command, cwd)
            actual = done.stdout.split("\n")
            if done.returncode != 0:
                problems.append(f"{where}: `{command}` exit {done.returncode}\n{done.stdout}")
            elif not output_matches(expected, actual):
                problems.append(f"{where}: `{command}` printed\n{done.stdout}\n"
                                f"but the page states\n" + "\n".join(expected))
    return problems


PAGES = [ROOT / "README.md"] + sorted((ROOT / "docs").glob("*.md"))
RUNNABLE = [p for p in PAGES if runnable_blocks(p)]


@pytest.mark.parametrize("page", RUNNABLE, ids=[p.name for p in RUNNABLE])
def test_runnable_examples_print_what_the_page_states(page, tmp_path, demo_output):
    problems = run_page(page, _sandbox(tmp_path, demo_output))
    assert not problems, "\n\n".join(problems)


def test_readme_states_the_demo_counts_in_a_checked_block():
    """The demo's counts appear only where the test above compares them with the tool."""
    text = (ROOT / "README.md").read_text()
    checked = "\n".join(b.text for b in runnable_blocks(ROOT / "README.md")
                        if b.kind == "console")
    assert re.search(r"rows read \d+ = written \d+ \+ set aside \d+; flagged \d+", checked)
    unchecked = text
    for b in runnable_blocks(ROOT / "README.md"):
        unchecked = unchecked.replace(b.text, "")
    assert not re.search(r"flag(?:s|ged) \d", unchecked), \
        "README states a flagged-row count outside a checked block"


def test_readme_has_no_machine_figures():
    """Speed and memory figures live in docs/performance.md, each naming its benchmark."""
    text = (ROOT / "README.md").read_text()
    assert not re.search(r"\d[\d,.]*\s*(?:rows/s|MiB|MB/s|GiB)", text)
    assert "docs/performance.md" in text


def test_performance_figures_name_their_benchmark():
    """Every row of the figures table of docs/performance.md names the script that measures it."""
    rows = [line for line in (ROOT / "docs" / "performance.md").read_text().split("\n")
            if line.startswith("| ") and not line.startswith("| what") and "---" not in line]
    assert rows
    for row in rows:
        scripts = re.findall(r"benchmarks/(bench_\w+\.py)", row)
        assert scripts, f"docs/performance.md row names no benchmark: {row[:60]}"
        for script in scripts:
            assert (ROOT / "benchmarks" / script).exists(), script
            assert script in (ROOT / "benchmarks" / "run_all.py").read_text(), \
                f"{script} is not run by make bench"


def test_performance_figures_come_from_the_one_make_bench_log():
    """Every bold figure of docs/performance.md's table is printed, as written, in the one
    `make bench` log the page names (so the page cannot drift from a measurement)."""
    page = (ROOT / "docs" / "performance.md").read_text()
    (log_name,) = set(re.findall(r"\(bench/(make-bench-[\d-]+\.log)\)", page))
    log = (ROOT / "docs" / "bench" / log_name).read_text()
    rows = [line for line in page.split("\n") if line.startswith("| ") and "---" not in line]
    figures = [n for row in rows for bold in re.findall(r"\*\*(.+?)\*\*", row)
               for n in re.findall(r"\d[\d,]*(?:\.\d+)?(?:e-?\d+)?", bold)]
    assert len(figures) > 30
    missing = [n for n in figures if n not in log]
    assert not missing, f"bold figures of docs/performance.md not in {log_name}: {missing}"


def test_report_sections_listed_as_the_page_shows_them(tmp_path, demo_output):
    """docs/report.md lists the report's sections (its bold bullets) as the page titles them."""
    text = (ROOT / "docs" / "report.md").read_text()
    listed = re.findall(r"^- \*\*(.+?)\*\*", text, re.M)
    sandbox = _sandbox(tmp_path, demo_output)
    done = _shell("annotator report demo_output --to report.html", sandbox)
    assert done.returncode == 0, done.stdout
    shown = re.findall(r"<h2>(.*?)</h2>", (sandbox / "report.html").read_text())
    assert listed == shown


# -- the matcher itself (so that a block cannot pass by accident) ---------------------------

def test_output_matcher():
    assert output_matches(["a 1", "...", "c ... s"], ["a 1", "b", "b", "c 0.3 s"])
    assert output_matches(["a", "...", "b"], ["a", "b"])
    assert not output_matches(["a 1"], ["a 2"])
    assert not output_matches(["flagged 131"], ["flagged 3825"])
    assert not output_matches(["a", "b"], ["a", "b", "c"])
    assert not output_matches(["a", "...", "c"], ["a", "b"])
