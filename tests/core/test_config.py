"""The job spec: every error names the key and what would be valid; nothing is touched."""

from __future__ import annotations

import pytest

from annotator.config import DEFAULT_CHUNK_ROWS, job_from_mapping, load_job
from annotator.errors import ConfigError


def _job(**data):
    data.setdefault("input", {"paths": ["cat.parquet"]})
    return job_from_mapping(data)


def test_defaults():
    job = _job()
    assert job.chunk_rows == DEFAULT_CHUNK_ROWS
    assert job.cosmology == {"preset": "planck2018"}
    assert job.compression == "zstd" and job.overwrite is False


@pytest.mark.parametrize("data,needle", [
    ({"input": {"paths": ["a"], "fromat": "csv"}}, "[input].fromat: unknown key"),
    ({"input": {"paths": ["a"], "format": "votable"}}, "[input].format: 'votable' is not one of"),
    ({"input": {"paths": 3}}, "[input].paths: expected a list"),
    ({"input": {"paths": []}}, "[input].paths: no input given"),
    ({"input": {"paths": ["a"], "delimiter": "||"}}, "[input].delimiter"),
    ({"input": {"paths": ["a"], "column_types": {"id": "integer"}}},
     "[input].column_types.id: 'integer' is not one of"),
    ({"output": {"chunk_rows": "many"}}, "[output].chunk_rows: expected an integer"),
    ({"output": {"chunk_rows": 10}}, "outside the allowed range"),
    ({"output": {"compression": "brotli9"}}, "[output].compression"),
    ({"output": {"overwrite": "yes"}}, "[output].overwrite: expected true or false"),
    ({"annotators": {"distances": "on"}}, "[annotators].distances: expected true, false"),
    ({"annotators": {"distances": {"enabled": 1}}}, "[annotators.distances].enabled"),
    ({"cosmology": "planck2018"}, "[cosmology]: expected a table"),
    ({"bands": 3}, "bands: unknown top-level key"),
])
def test_errors_name_the_key(data, needle):
    with pytest.raises(ConfigError) as info:
        _job(**data)
    assert needle in str(info.value)


def test_cli_overrides_win(tmp_path):
    job = job_from_mapping({"input": {"paths": ["x.parquet"]}, "output": {"chunk_rows": 5000}},
                           base_dir=tmp_path, inputs=[str(tmp_path / "y.csv")],
                           chunk_rows=20_000, cosmology_preset="wmap9", overwrite=True)
    assert [p.name for p in job.inputs] == ["y.csv"]
    assert job.chunk_rows == 20_000 and job.overwrite
    assert job.cosmology == {"preset": "wmap9"}


def test_bad_toml_names_the_file(tmp_path):
    path = tmp_path / "job.toml"
    path.write_text("[input\npaths = 1\n")
    with pytest.raises(ConfigError, match="job.toml: not valid TOML"):
        load_job(path)
    with pytest.raises(ConfigError, match="no such file"):
        load_job(tmp_path / "absent.toml")


def test_validation_has_no_side_effects(tmp_path):
    job_from_mapping({"input": {"paths": ["a.parquet"]}, "output": {"dir": "out"}},
                     base_dir=tmp_path)
    assert list(tmp_path.iterdir()) == []
