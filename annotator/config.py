"""The job spec: a TOML job file (or the same mapping from the CLI or the HTTP service).

Parsing and validation have no side effects: nothing is created, opened or deleted here.
Every error names the key at fault and says what would be valid.

A job file::

    [input]
    paths = ["catalogue.parquet", "more/"]   # files or folders, relative to this file
    format = "auto"                          # auto | parquet | csv | fits
    hdu = 1                                  # FITS only: HDU number or EXTNAME (default:
                                             # the first binary table)
    delimiter = ","                          # CSV only
    column_types = { objid = "int64" }       # CSV only: override the inferred type
    encoding = "utf-8"                       # CSV only: any ASCII-compatible encoding
    missing_tokens = ["", "NA", "N/A", "null", "NaN", "nan", "-"]   # CSV only: "no value"
    sentinels = { mag_r = [-99, 99] }        # any format: values that mean "not measured"

    [output]
    dir = "annotated"
    chunk_rows = 250000
    compression = "zstd"                     # zstd | snappy | gzip | lz4 | none
    overwrite = false

    [cosmology]
    preset = "planck2018"                    # or explicit parameters

    [columns]
    redshift = "z"                           # logical name = catalogue column

    [annotators]
    horizons = true                          # enable / disable by name
    [annotators.some_annotator]              # or a table of options
    enabled = true
"""

from __future__ import annotations

import sys
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

if sys.version_info >= (3, 11):
    import tomllib
else:  # pragma: no cover
    import tomli as tomllib

from .errors import ConfigError
from .io.missing import DEFAULT_MISSING_TOKENS, parse_missing_tokens, parse_sentinels

CORE_SECTIONS = ("input", "output", "cosmology", "columns", "annotators")
INPUT_KEYS = ("paths", "format", "delimiter", "column_types", "encoding", "missing_tokens",
              "sentinels", "hdu")
OUTPUT_KEYS = ("dir", "chunk_rows", "compression", "overwrite")
FORMATS = ("auto", "parquet", "csv", "fits")
COMPRESSIONS = ("zstd", "snappy", "gzip", "lz4", "none")
ARROW_TYPE_NAMES = ("int8", "int16", "int32", "int64", "float32", "float64", "bool", "string")
DEFAULT_CHUNK_ROWS = 250_000
DEFAULT_PRESET = "planck2018"


@dataclass
class Job:
    """A validated job.

    :ivar inputs: catalogue files or folders, absolute.
    :ivar output_dir: where part files, manifest and rejected rows go.
    :ivar input_format: ``auto`` (by extension), ``parquet``, ``csv`` or ``fits``.
    :ivar delimiter: CSV field delimiter.
    :ivar column_types: CSV column type overrides, ``{column: arrow type name}``.
    :ivar hdu: FITS only: the table HDU, by number (0 = primary) or EXTNAME; ``None`` = the
        first binary table.
    :ivar encoding: CSV text encoding (ASCII-compatible; default UTF-8).
    :ivar missing_tokens: CSV cell texts that mean "no value".
    :ivar sentinels: ``{column: (values…)}`` read as null and flagged, in every format.
    :ivar chunk_rows: rows per batch and per part file.
    :ivar compression: Parquet codec of the output.
    :ivar overwrite: replace a non-empty output folder.
    :ivar cosmology: the ``[cosmology]`` table (a preset name and/or parameters).
    :ivar cosmology_is_default: neither the job file nor the command line chose one.
    :ivar columns: the ``[columns]`` table (logical name -> catalogue column, and settings).
    :ivar annotators: ``{name: {"enabled": bool | None, "options": dict}}``.
    :ivar sections: other top-level tables, each claimed by an annotator at plan time.
    :ivar base_dir: folder relative paths are resolved against (the job file's folder).
    :ivar source: the job file, when there is one.
    :ivar allowed_roots: when set, the only folders files named in annotator options may be
        read from (the service sets its data roots; the command line leaves it empty).
    """

    inputs: list[Path]
    output_dir: Path | None
    input_format: str = "auto"
    delimiter: str = ","
    column_types: dict[str, str] = field(default_factory=dict)
    hdu: int | str | None = None
    encoding: str = "utf-8"
    missing_tokens: tuple[str, ...] = DEFAULT_MISSING_TOKENS
    sentinels: dict[str, tuple] = field(default_factory=dict)
    chunk_rows: int = DEFAULT_CHUNK_ROWS
    compression: str = "zstd"
    overwrite: bool = False
    cosmology: dict = field(default_factory=lambda: {"preset": DEFAULT_PRESET})
    cosmology_is_default: bool = False
    columns: dict = field(default_factory=dict)
    annotators: dict = field(default_factory=dict)
    sections: dict = field(default_factory=dict)
    base_dir: Path = field(default_factory=Path.cwd)
    source: Path | None = None
    allowed_roots: tuple[Path, ...] = ()

    def to_dict(self) -> dict:
        """JSON-serialisable form (recorded in the manifest; compared on resume)."""
        return {
            "inputs": [str(p) for p in self.inputs],
            "output_dir": str(self.output_dir) if self.output_dir else None,
            "input_format": self.input_format,
            "delimiter": self.delimiter,
            "column_types": dict(self.column_types),
            "hdu": self.hdu,
            "encoding": self.encoding,
            "missing_tokens": list(self.missing_tokens),
            "sentinels": {k: list(v) for k, v in self.sentinels.items()},
            "chunk_rows": self.chunk_rows,
            "compression": self.compression,
            "cosmology": self.cosmology,
            "columns": self.columns,
            "annotators": self.annotators,
            "sections": self.sections,
            "base_dir": str(self.base_dir),
            "source": str(self.source) if self.source else None,
        }

    def reader_options(self) -> dict:
        """Keyword arguments for ``annotator.io.readers.open_reader``."""
        return {"delimiter": self.delimiter, "column_types": dict(self.column_types),
                "encoding": self.encoding, "missing_tokens": self.missing_tokens,
                "hdu": self.hdu}

    def fingerprint(self) -> dict:
        """What must not change between a run and its resumption."""
        d = self.to_dict()
        for key in ("output_dir", "source", "base_dir"):
            d.pop(key)
        return d


def _expect(value: Any, typ, key: str, what: str):
    if not isinstance(value, typ) or (typ is int and isinstance(value, bool)):
        raise ConfigError(f"{key}: expected {what}, got {value!r}")
    return value


def _check_keys(table: dict, known: tuple[str, ...], where: str) -> None:
    for key in table:
        if key not in known:
            raise ConfigError(
                f"[{where}].{key}: unknown key (allowed: {', '.join(known)})"
            )


def load_job_file(path: str | Path) -> dict:
    """Parse a TOML job file; errors name the file and the line."""
    p = Path(path)
    if not p.is_file():
        raise ConfigError(f"job file {p}: no such file")
    try:
        with p.open("rb") as fh:
            return tomllib.load(fh)
    except tomllib.TOMLDecodeError as exc:
        raise ConfigError(f"job file {p}: not valid TOML: {exc}") from exc


def job_from_mapping(
    data: dict,
    *,
    base_dir: Path | None = None,
    source: Path | None = None,
    inputs: list[str] | None = None,
    output_dir: str | None = None,
    cosmology_preset: str | None = None,
    chunk_rows: int | None = None,
    overwrite: bool | None = None,
) -> Job:
    """Validate a job mapping (a parsed job file), with command-line overrides applied."""
    if not isinstance(data, dict):
        raise ConfigError("job: expected a table of sections")
    base = Path(base_dir) if base_dir else Path.cwd()
    sections = {k: v for k, v in data.items() if k not in CORE_SECTIONS}
    for key, value in sections.items():
        if not isinstance(value, dict):
            raise ConfigError(f"{key}: unknown top-level key (allowed: {', '.join(CORE_SECTIONS)})")

    inp = _expect(data.get("input", {}), dict, "[input]", "a table")
    _check_keys(inp, INPUT_KEYS, "input")
    out = _expect(data.get("output", {}), dict, "[output]", "a table")
    _check_keys(out, OUTPUT_KEYS, "output")

    if inputs:
        paths = [Path(p).expanduser().resolve() for p in inputs]
    else:
        raw = inp.get("paths", [])
        if isinstance(raw, str):
            raw = [raw]
        _expect(raw, list, "[input].paths", "a list of file or folder paths")
        for item in raw:
            _expect(item, str, "[input].paths", "a list of file or folder paths")
        paths = [(base / Path(p).expanduser()).resolve() for p in raw]
    if not paths:
        raise ConfigError("[input].paths: no input given (name catalogue files or folders)")

    fmt = _expect(inp.get("format", "auto"), str, "[input].format", "a string")
    if fmt not in FORMATS:
        raise ConfigError(f"[input].format: {fmt!r} is not one of {', '.join(FORMATS)}")
    delimiter = _expect(inp.get("delimiter", ","), str, "[input].delimiter", "one character")
    if len(delimiter) != 1:
        raise ConfigError(f"[input].delimiter: expected one character, got {delimiter!r}")
    column_types = _expect(inp.get("column_types", {}), dict, "[input].column_types", "a table")
    for col, typ in column_types.items():
        if typ not in ARROW_TYPE_NAMES:
            raise ConfigError(
                f"[input].column_types.{col}: {typ!r} is not one of {', '.join(ARROW_TYPE_NAMES)}"
            )
    hdu = inp.get("hdu")
    if hdu is not None and (isinstance(hdu, bool) or not isinstance(hdu, (int, str))
                            or (isinstance(hdu, int) and hdu < 0) or hdu == ""):
        raise ConfigError(f"[input].hdu: expected an HDU number (0 or more) or an EXTNAME, "
                          f"got {hdu!r}")
    encoding = _expect(inp.get("encoding", "utf-8"), str, "[input].encoding", "a string")
    if encoding != "utf-8":  # the default needs no check (nor the CSV reader's import)
        from .io.csv import check_encoding

        encoding = check_encoding(encoding)
    missing_tokens = parse_missing_tokens(inp["missing_tokens"]) if "missing_tokens" in inp \
        else DEFAULT_MISSING_TOKENS
    sentinels = parse_sentinels(inp.get("sentinels", {}))

    if output_dir is not None:
        out_dir = Path(output_dir).expanduser().resolve()
    elif "dir" in out:
        out_dir = (base / Path(_expect(out["dir"], str, "[output].dir", "a path"))).resolve()
    else:
        out_dir = None
    rows = chunk_rows if chunk_rows is not None else out.get("chunk_rows", DEFAULT_CHUNK_ROWS)
    _expect(rows, int, "[output].chunk_rows" if chunk_rows is None else "--chunk-rows", "an integer")
    if not 1_000 <= rows <= 50_000_000:
        raise ConfigError(
            f"{'--chunk-rows' if chunk_rows is not None else '[output].chunk_rows'}: "
            f"{rows} is outside the allowed range 1000 to 50000000"
        )
    compression = _expect(out.get("compression", "zstd"), str, "[output].compression", "a string")
    if compression not in COMPRESSIONS:
        raise ConfigError(
            f"[output].compression: {compression!r} is not one of {', '.join(COMPRESSIONS)}"
        )
    ow = overwrite if overwrite else out.get("overwrite", False)
    _expect(ow, bool, "[output].overwrite", "true or false")

    cosmo = _expect(data.get("cosmology", {}), dict, "[cosmology]", "a table")
    cosmology_is_default = not cosmology_preset and not cosmo
    if cosmology_preset:
        cosmo = {"preset": cosmology_preset}
    elif not cosmo:
        cosmo = {"preset": DEFAULT_PRESET}

    columns = _expect(data.get("columns", {}), dict, "[columns]", "a table")
    for key, value in columns.items():
        _expect(value, (str, int, float, bool, list, dict), f"[columns].{key}", "a value")

    annotators: dict[str, dict] = {}
    raw_ann = _expect(data.get("annotators", {}), dict, "[annotators]", "a table")
    for name, value in raw_ann.items():
        if isinstance(value, bool):
            annotators[name] = {"enabled": value, "options": {}}
        elif isinstance(value, dict):
            opts = dict(value)
            enabled = opts.pop("enabled", None)
            if enabled is not None:
                _expect(enabled, bool, f"[annotators.{name}].enabled", "true or false")
            annotators[name] = {"enabled": enabled, "options": opts}
        else:
            raise ConfigError(
                f"[annotators].{name}: expected true, false or a table of options, got {value!r}"
            )

    return Job(
        inputs=paths,
        output_dir=out_dir,
        input_format=fmt,
        delimiter=delimiter,
        column_types=dict(column_types),
        hdu=hdu,
        encoding=encoding,
        missing_tokens=missing_tokens,
        sentinels=sentinels,
        chunk_rows=rows,
        compression=compression,
        overwrite=ow,
        cosmology=dict(cosmo),
        cosmology_is_default=cosmology_is_default,
        columns=dict(columns),
        annotators=annotators,
        sections=sections,
        base_dir=base.resolve(),
        source=source,
    )


def load_job(path: str | Path | None = None, **overrides) -> Job:
    """A job from a job file (or none) plus command-line overrides."""
    if path is None:
        return job_from_mapping({}, base_dir=Path.cwd(), **overrides)
    p = Path(path).resolve()
    return job_from_mapping(load_job_file(p), base_dir=p.parent, source=p, **overrides)
