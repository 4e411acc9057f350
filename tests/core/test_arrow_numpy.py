"""numpy <-> Arrow without pyarrow's pandas shim (annotator/arrow_numpy.py), and what a
Parquet-only run imports.

Outside reference for the converters: pyarrow's own ``pa.array`` and ``Array.to_numpy``
(same values, nulls, types). The import checks run ``annotator run`` in a fresh interpreter
and fail if pandas, scipy.special's package or pyarrow.compute comes back on that path.
"""

from __future__ import annotations

import json
import subprocess
import sys

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from annotator.arrow_numpy import from_numpy, null_mask, string_array, to_numpy

RNG = np.random.default_rng(3)
NUMERIC = [np.int8, np.int16, np.int32, np.int64, np.uint8, np.uint16, np.uint32, np.uint64,
           np.float16, np.float32, np.float64]


def _same(a: np.ndarray, b: np.ndarray) -> None:
    assert a.dtype == b.dtype and a.shape == b.shape
    np.testing.assert_array_equal(a, b)  # NaN == NaN here


@pytest.mark.parametrize("dtype", NUMERIC + [bool])
@pytest.mark.parametrize("with_nulls", [False, True])
@pytest.mark.parametrize("offset", [0, 3])
def test_to_numpy_is_pyarrows(dtype, with_nulls, offset):
    values = (RNG.integers(0, 100, 37) > 50) if dtype is bool else \
        RNG.integers(0, 100, 37).astype(dtype)
    mask = (RNG.random(37) < 0.3) if with_nulls else None
    arr = pa.array(values, mask=mask).slice(offset)
    if dtype is bool and with_nulls:  # pyarrow gives objects; handed to pyarrow itself
        assert to_numpy(arr).tolist() == arr.to_numpy(zero_copy_only=False).tolist()
        return
    _same(to_numpy(arr), arr.to_numpy(zero_copy_only=False))
    _same(to_numpy(pa.chunked_array([arr, arr])),
          pa.chunked_array([arr, arr]).to_numpy())
    np.testing.assert_array_equal(null_mask(arr),
                                  arr.is_null().to_numpy(zero_copy_only=False))


def test_to_numpy_of_empty_and_of_other_types():
    for typ in (pa.float64(), pa.int32(), pa.bool_()):
        _same(to_numpy(pa.array([], type=typ)),
              pa.array([], type=typ).to_numpy(zero_copy_only=False))
    strings = pa.array(["a", None, "c"])
    assert to_numpy(strings).tolist() == ["a", None, "c"]
    assert null_mask(strings).tolist() == [False, True, False]


@pytest.mark.parametrize("dtype", NUMERIC + [bool])
def test_from_numpy_is_pa_array(dtype):
    values = (RNG.integers(0, 100, 41) > 50) if dtype is bool else \
        RNG.integers(0, 100, 41).astype(dtype)
    assert from_numpy(values).equals(pa.array(values))
    mask = RNG.random(41) < 0.3
    assert from_numpy(values, mask=mask).equals(pa.array(values, mask=mask))
    assert from_numpy(values[::2]).equals(pa.array(values[::2]))  # strided: copied


def test_from_numpy_nan_as_null_types_and_errors():
    x = np.array([1.5, np.nan, -2.0, np.inf, np.nan])
    mask = np.array([True, False, False, False, False])
    for kw in ({}, {"mask": mask}):
        for nan in (False, True):
            for typ in (None, pa.float64(), pa.float32()):
                got = from_numpy(x, typ, nan_is_null=nan, **kw)
                want = pa.array(x, type=typ, from_pandas=nan, **kw)
                # Arrow's equals() has NaN != NaN: compare type, nulls and values apart
                assert got.type == want.type and got.null_count == want.null_count
                assert got.is_null().equals(want.is_null()), (kw, nan, typ)
                np.testing.assert_array_equal(got.to_numpy(zero_copy_only=False),
                                              want.to_numpy(zero_copy_only=False))
    ints = np.array([1, 2, 3], dtype=np.int64)
    assert from_numpy(ints, pa.float64()).equals(pa.array(ints, type=pa.float64()))
    assert from_numpy(ints.astype(">i8")).equals(pa.array(ints))  # big-endian input
    with pytest.raises(pa.ArrowInvalid):  # a safe cast, as pa.array's
        from_numpy(np.array([1.5]), pa.int64())
    with pytest.raises(TypeError):
        from_numpy(x, mask=np.zeros(5, dtype=np.int8))
    with pytest.raises(ValueError):
        from_numpy(x, mask=np.zeros(4, dtype=bool))
    # what it does not build itself, pyarrow does
    assert from_numpy(np.array(["a", "b"])).equals(pa.array(["a", "b"]))


def test_string_array_is_pa_array():
    for texts in ([], [""], ["redshift_missing", "", "a;b", "ünïcode"]):
        assert string_array(texts).equals(pa.array(texts, type=pa.string()))


# -- what a Parquet-only run imports --------------------------------------------------------

PROBE = r"""
import json, sys
from annotator.cli import main
rc = main(["run", sys.argv[1], "--out", sys.argv[2], "--quiet"])
heavy = ["pandas", "scipy.special", "pyarrow.compute", "annotator.io.csv", "duckdb",
         "astropy", "numpy.ma", "importlib.metadata"]
print(json.dumps({"rc": rc, "imported": [m for m in heavy if m in sys.modules],
                  "ufunc": "scipy.special._ufuncs" in sys.modules}))
"""


def _imports_of_a_run(tmp_path, table) -> dict:
    path = tmp_path / "c.parquet"
    pq.write_table(table, path)
    proc = subprocess.run([sys.executable, "-c", PROBE, str(path), str(tmp_path / "out")],
                          capture_output=True, text=True, timeout=120)
    assert proc.returncode == 0, proc.stderr
    return json.loads(proc.stdout.strip().splitlines()[-1])


def test_a_parquet_run_imports_no_pandas_no_scipy_special_no_compute(tmp_path):
    n = 2000
    z = RNG.uniform(0.01, 3.0, n)
    table = pa.table({"objid": np.arange(n), "ra": RNG.uniform(0, 10, n),
                      "dec": RNG.uniform(0, 10, n), "z": z, "z_err": 0.05 * (1 + z)})
    got = _imports_of_a_run(tmp_path, table)
    assert got["rc"] == 0
    assert got["imported"] == []
    assert got["ufunc"]  # the uncertainties did evaluate the normal CDF (scipy's ufunc)


def test_a_run_with_flagged_rows_still_imports_no_pandas(tmp_path):
    n = 500
    z = RNG.uniform(0.01, 3.0, n)
    z[:7] = np.nan  # flagged rows: the flags column then goes through a dictionary
    table = pa.table({"objid": np.arange(n), "z": pa.array(z, from_pandas=True),
                      "z_err": 0.05 * (1 + np.nan_to_num(z))})
    got = _imports_of_a_run(tmp_path, table)
    assert got["rc"] == 0
    assert "pandas" not in got["imported"] and "scipy.special" not in got["imported"]
    assert "numpy.ma" not in got["imported"]  # reachable's nulls without a MaskedArray


def test_ndtr_is_scipys_own_ufunc_and_scipy_special_still_imports():
    """The uncertainties load scipy.special.ndtr without the package's __init__; the package
    imported afterwards is the real one, with the same ufunc."""
    code = ("import sys; import annotator_plugins.uncertainties as u; import numpy as np;"
            "v = u.ndtr(np.array([-1.0, 0.0, 2.5]));"
            "assert 'scipy.special' not in sys.modules;"
            "import scipy.special as s; assert s.ndtr is u._ndtr;"
            "assert (v == s.ndtr(np.array([-1.0, 0.0, 2.5]))).all();"
            "assert s.erf(0.0) == 0.0 and hasattr(s, 'gammaln'); print('ok')")
    proc = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                          timeout=60)
    assert proc.returncode == 0 and proc.stdout.strip() == "ok", proc.stderr


def test_an_annotators_masked_array_or_arrow_array_becomes_the_column_with_its_nulls():
    """The pipeline looks for numpy.ma.MaskedArray only once numpy.ma is loaded (so a run
    whose annotators return none never imports it); one returned is still honoured."""
    import numpy.ma  # noqa: F401  (an annotator returning a MaskedArray has loaded it)

    from annotator.columns import ColumnSpec
    from annotator.pipeline import _to_arrow

    spec = ColumnSpec("x", pa.float64(), None, "meta.code", "x")
    values = np.ma.MaskedArray([1.0, np.nan, 3.0], mask=[False, False, True])
    got = _to_arrow(values, spec, 3, "test")
    assert got.type == pa.float64() and got.is_null().to_pylist() == [False, False, True]
    assert got[0].as_py() == 1.0 and np.isnan(got[1].as_py())  # NaN stays a value
    flag = ColumnSpec("b", pa.bool_(), None, "meta.code", "b")
    arrow = from_numpy(np.array([True, False, True]), pa.bool_(), mask=np.array([0, 1, 0], bool))
    assert _to_arrow(arrow, flag, 3, "test").equals(pa.array([True, None, True]))


ENV_PROBE = r"""
import json, os, sys
import annotator
before = "numpy" in sys.modules  # the package alone imports no numpy (its API is lazy)
import annotator.cli
from annotator import Annotator, ColumnSpec, hookimpl  # still importable from the package
print(json.dumps({"numpy_before_cli": before,
                  "timeout": os.environ.get("OPENBLAS_THREAD_TIMEOUT")}))
"""


@pytest.mark.parametrize("given", [None, "28"])
def test_the_command_line_sets_openblas_thread_timeout_before_numpy_loads(given):
    """OpenBLAS reads OPENBLAS_THREAD_TIMEOUT once, when numpy loads it: the command line
    must set it before any numpy import (else its threads spin ~0.1 s each at start-up);
    a value the user set is kept."""
    import os

    env = {k: v for k, v in os.environ.items() if k != "OPENBLAS_THREAD_TIMEOUT"}
    if given is not None:
        env["OPENBLAS_THREAD_TIMEOUT"] = given
    proc = subprocess.run([sys.executable, "-c", ENV_PROBE], capture_output=True, text=True,
                          timeout=120, env=env)
    assert proc.returncode == 0, proc.stderr
    got = json.loads(proc.stdout.strip().splitlines()[-1])
    assert got["numpy_before_cli"] is False
    assert got["timeout"] == (given or "20")
