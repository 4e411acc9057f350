"""The plugin machinery itself: discovery, validation, ordering, clashes."""

from __future__ import annotations

import json
import os
import subprocess
import sys
import types

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

import annotator
from annotator import Annotator, ColumnSpec, hookimpl
from annotator.config import job_from_mapping
from annotator.errors import ConfigError, PlanError, PluginError
from annotator.pipeline import Pipeline
from annotator.plan import build_plan
from annotator.registry import collect_annotators, load_registry


_counter = iter(range(10**6))


def _plugin(*classes):
    mod = types.ModuleType(f"test_plugin_{next(_counter)}")

    @hookimpl
    def register_annotators():
        return list(classes)

    mod.register_annotators = register_annotators
    return mod


class DoubleZ(Annotator):
    name = "double_z"
    version = "0.1"
    summary = "twice the redshift (test)"
    requires = ("redshift",)
    provides = (ColumnSpec("double_z", pa.float64(), None, "src.redshift", "2 z"),)

    def annotate(self, batch):
        return {"double_z": 2 * batch.values("redshift")}


class UsesDoubleZ(Annotator):
    name = "uses_double_z"
    position = 1  # would run first, but its input forces it after double_z
    requires = ("double_z",)
    provides = (ColumnSpec("quad_z", pa.float64(), None, None, "4 z"),)

    def annotate(self, batch):
        return {"quad_z": 2 * batch.values("double_z")}


def _job(path, tmp_path, **extra):
    data = {"input": {"paths": [str(path)]}, "output": {"dir": str(tmp_path / "out")}}
    data.update(extra)
    return job_from_mapping(data, base_dir=tmp_path)


def test_builtins_come_from_the_entry_point_group():
    found = collect_annotators(load_registry())
    for name in ("redshift_checks", "distances", "times", "velocities", "horizons"):
        assert name in found
        assert found[name].distribution.endswith("(built-in)")
        assert found[name].cls.__module__.startswith("annotator_plugins.")


def test_core_never_imports_plugins():
    # The wall: annotator/ (except by entry points) knows nothing about any annotator.
    import ast

    root = os.path.dirname(annotator.__file__)
    for dirpath, _, files in os.walk(root):
        for f in files:
            if f.endswith(".py"):
                tree = ast.parse(open(os.path.join(dirpath, f), encoding="utf-8").read())
                for node in ast.walk(tree):
                    names = []
                    if isinstance(node, ast.Import):
                        names = [a.name for a in node.names]
                    elif isinstance(node, ast.ImportFrom) and node.module:
                        names = [node.module]
                    assert not any(n.split(".")[0] == "annotator_plugins" for n in names), f


def test_misspelt_hook_fails_loudly():
    mod = types.ModuleType("typo_plugin")

    @hookimpl
    def register_annotator():  # missing "s"
        return []

    mod.register_annotator = register_annotator
    with pytest.raises(PluginError, match="register_annotator"):
        load_registry(extra_plugins=[mod])


def test_duplicate_annotator_name_names_both_plugins():
    class Clash(DoubleZ):
        pass

    pm = load_registry(extra_plugins=[_plugin(DoubleZ), _plugin(Clash)])
    with pytest.raises(PluginError, match="double_z.*registered twice"):
        collect_annotators(pm)


def test_output_column_clash_is_refused_before_reading(catalogue_parquet, tmp_path):
    class Other(Annotator):
        name = "other"
        requires = ("redshift",)
        provides = (ColumnSpec("comoving_distance_mpc", pa.float64(), "Mpc", None, "x"),)

    pm = load_registry(extra_plugins=[_plugin(Other)])
    with pytest.raises(PlanError, match="comoving_distance_mpc.*two annotators.*distances.*other"):
        build_plan(_job(catalogue_parquet, tmp_path), pm)


def test_catalogue_column_clash_is_refused(tmp_path, catalogue_table):
    path = tmp_path / "c.parquet"
    pq.write_table(catalogue_table.append_column("reachable", pa.array(
        np.ones(catalogue_table.num_rows, dtype=bool))), path)
    with pytest.raises(PlanError, match="'reachable'.*already exists"):
        build_plan(_job(path, tmp_path))


def test_dependencies_order_annotators(catalogue_parquet, tmp_path):
    pm = load_registry(extra_plugins=[_plugin(DoubleZ, UsesDoubleZ)])
    plan = build_plan(_job(catalogue_parquet, tmp_path), pm)
    names = [s.name for s in plan.steps]
    assert names.index("double_z") < names.index("uses_double_z")
    assert plan.steps[names.index("uses_double_z")].resolve["double_z"] == ("computed",
                                                                            "double_z")


def test_cycle_is_refused(catalogue_parquet, tmp_path):
    class A(Annotator):
        name = "cyc_a"
        requires = ("col_b",)
        provides = (ColumnSpec("col_a", pa.float64(), None, None, "a"),)

    class B(Annotator):
        name = "cyc_b"
        requires = ("col_a",)
        provides = (ColumnSpec("col_b", pa.float64(), None, None, "b"),)

    pm = load_registry(extra_plugins=[_plugin(A, B)])
    with pytest.raises(PlanError, match="cycle"):
        build_plan(_job(catalogue_parquet, tmp_path), pm)


def test_missing_input_is_refused_with_the_names_tried(tmp_path):
    path = tmp_path / "noz.parquet"
    pq.write_table(pa.table({"objid": [1, 2], "magnitude": [20.0, 21.0]}), path)
    with pytest.raises(PlanError, match=r"needs input 'redshift'.*tried: redshift, z,"):
        build_plan(_job(path, tmp_path))


def test_unknown_annotator_section_and_mapping_are_refused(catalogue_parquet, tmp_path):
    with pytest.raises(ConfigError, match=r"\[annotators\]\.distancez: no such annotator"):
        build_plan(_job(catalogue_parquet, tmp_path, annotators={"distancez": True}))
    with pytest.raises(ConfigError, match="colours: unknown top-level key"):
        build_plan(_job(catalogue_parquet, tmp_path, colours={"g": 1}))
    with pytest.raises(ConfigError, match=r"\[columns\]\.redshfit: no enabled annotator"):
        build_plan(_job(catalogue_parquet, tmp_path, columns={"redshfit": "z"}))
    with pytest.raises(ConfigError, match=r"\[columns\]\.redshift: column 'zz' is not"):
        build_plan(_job(catalogue_parquet, tmp_path, columns={"redshift": "zz"}))


def test_disabling_an_annotator_drops_its_columns(catalogue_parquet, tmp_path):
    plan = build_plan(_job(catalogue_parquet, tmp_path, annotators={"horizons": False}))
    names = [c.name for c in plan.added_columns]
    assert "reachable" not in names and "comoving_distance_mpc" in names
    assert ("horizons", "disabled ([annotators] horizons = false)") in plan.skipped


def test_undeclared_flag_and_wrong_length_are_plugin_errors(catalogue_parquet, tmp_path):

    class Sloppy(Annotator):
        name = "sloppy"
        requires = ("redshift",)
        provides = (ColumnSpec("sloppy_x", pa.float64(), None, None, "x"),)

        def annotate(self, batch):
            batch.flag("never_declared", np.zeros(batch.num_rows, dtype=bool))
            return {"sloppy_x": np.zeros(batch.num_rows)}

    class Short(Sloppy):
        name = "short"
        provides = (ColumnSpec("short_x", pa.float64(), None, None, "x"),)

        def annotate(self, batch):
            return {"short_x": np.zeros(batch.num_rows - 1)}

    table = pq.read_table(catalogue_parquet)
    for cls, pattern in ((Sloppy, "never_declared"), (Short, "values for a batch")):
        pm = load_registry(extra_plugins=[_plugin(cls)])
        plan = build_plan(_job(catalogue_parquet, tmp_path), pm)
        with pytest.raises(PluginError, match=pattern):
            Pipeline.from_plan(plan).annotate(table)


THIRD_PARTY = '''
import numpy as np
import pyarrow as pa
from annotator import Annotator, ColumnSpec, hookimpl


class Brightest(Annotator):
    name = "brightness_rank"
    version = "2.3"
    summary = "Is the object brighter than 21 in r? (third-party test plugin)"
    requires = ("mag_r",)
    input_hints = {"mag_r": ("mag_r", "rmag")}
    provides = (ColumnSpec("bright_r", pa.bool_(), None, "meta.code", "mag_r < 21"),)

    def annotate(self, batch):
        return {"bright_r": batch.values("mag_r") < 21}


@hookimpl
def register_annotators():
    return [Brightest]
'''


def test_a_pip_installed_third_party_plugin_shows_up(tmp_path, catalogue_parquet):
    """A distribution on sys.path with an 'annotator' entry point, as pip would install it."""
    site = tmp_path / "site"
    site.mkdir()
    (site / "brightness_plugin.py").write_text(THIRD_PARTY)
    info = site / "brightness_plugin-2.3.dist-info"
    info.mkdir()
    (info / "METADATA").write_text("Metadata-Version: 2.1\nName: brightness-plugin\n"
                                   "Version: 2.3\n")
    (info / "entry_points.txt").write_text("[annotator]\nbrightness = brightness_plugin\n")
    env = dict(os.environ, PYTHONPATH=str(site))
    listing = subprocess.run([sys.executable, "-m", "annotator", "plugins", "--json"], env=env,
                             capture_output=True, text=True, check=True)
    records = {r["name"]: r for r in json.loads(listing.stdout)}
    assert records["brightness_rank"]["from"] == "brightness-plugin 2.3"
    assert records["brightness_rank"]["columns"][0]["name"] == "bright_r"

    out = tmp_path / "out"
    subprocess.run([sys.executable, "-m", "annotator", "run", str(catalogue_parquet), "--out",
                    str(out), "--quiet"], env=env, check=True, capture_output=True)
    table = pq.read_table(next(out.glob("part-*.parquet")))
    assert "bright_r" in table.column_names
    mags = table.column("mag_r").to_numpy()
    assert np.array_equal(table.column("bright_r").to_numpy(zero_copy_only=False), mags < 21)
    manifest = json.loads((out / "manifest.json").read_text())
    assert {"name": "brightness_rank", "version": "2.3"}.items() <= next(
        a for a in manifest["annotators"] if a["name"] == "brightness_rank").items()

    # the switch turns third-party autoload off
    env["ANNOTATOR_BUILTINS_ONLY"] = "1"
    listing = subprocess.run([sys.executable, "-m", "annotator", "plugins", "--json"], env=env,
                             capture_output=True, text=True, check=True)
    assert "brightness_rank" not in {r["name"] for r in json.loads(listing.stdout)}


def test_observed_prefix_skips_redefinitions(catalogue_parquet, tmp_path):
    class Shift(Annotator):
        name = "shift_z"
        position = 1
        requires = ("redshift",)
        provides = (ColumnSpec("z_shifted", pa.float64(), None, None, "z + 1"),)
        redefines = {"redshift": "z_shifted"}

        def annotate(self, batch):
            return {"z_shifted": batch.values("redshift") + 1}

    class Both(Annotator):
        name = "both_z"
        requires = ("redshift", "observed:redshift")
        provides = (ColumnSpec("z_difference", pa.float64(), None, None, "shifted - own"),)

        def annotate(self, batch):
            return {"z_difference": batch.values("redshift") - batch.values("observed:redshift")}

    pm = load_registry(extra_plugins=[_plugin(Shift, Both)])
    plan = build_plan(_job(catalogue_parquet, tmp_path), pm)
    step = next(s for s in plan.steps if s.name == "both_z")
    assert step.resolve == {"redshift": ("computed", "z_shifted"),
                            "observed:redshift": ("catalogue", "z")}
    table, _, _ = Pipeline.from_plan(plan).annotate(pq.read_table(catalogue_parquet))
    diff = table.column("z_difference").to_numpy(zero_copy_only=False)
    np.testing.assert_allclose(diff[5:], 1.0)
