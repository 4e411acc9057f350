"""Per-input counts and checksums in the manifest, against the inputs themselves."""

from __future__ import annotations

import hashlib
import json

import pyarrow as pa
import pyarrow.parquet as pq

from annotator.cli import main


def _csv(path, n, bad_at):
    rows = ["objid,z,mag_r"] + [f"{i},{0.01 + i * 1e-3:.6f},{20 + i * 1e-3:.6f}"
                                for i in range(n)]
    for k, at in enumerate(sorted(bad_at)):
        rows.insert(at, "bad,line" if k % 2 else f"{900000 + k},notanumber,20.0")
    path.write_text("\n".join(rows) + "\n")


def test_per_input_counts_and_checksums(tmp_path):
    folder = tmp_path / "in"
    folder.mkdir()
    # three inputs with 0, 1 and 3 malformed rows, two of them over several chunks
    _csv(folder / "a.csv", 1200, [])
    _csv(folder / "b.csv", 2500, [700])
    _csv(folder / "c.csv", 1800, [5, 600, 1700])
    out = tmp_path / "out"
    assert main(["run", str(folder), "--out", str(out), "--chunk-rows", "1000",
                 "--quiet"]) == 0
    m = json.loads((out / "manifest.json").read_text())
    by_name = {p["path"].rsplit("/", 1)[-1]: p for p in m["inputs"]}
    assert sorted(by_name) == ["a.csv", "b.csv", "c.csv"]
    expected = {"a.csv": (1200, 1200, 0), "b.csv": (2501, 2500, 1), "c.csv": (1803, 1800, 3)}
    for name, (read, written, rejected) in expected.items():
        p = by_name[name]
        assert (p["rows_read"], p["rows_written"], p["rows_rejected"]) == (read, written,
                                                                           rejected), name
        # the checksum covers the whole file (every input here is larger than 4 KiB)
        data = (folder / name).read_bytes()
        assert len(data) > 16384
        assert p["sha256"] == hashlib.sha256(data).hexdigest(), name
    # the rows set aside, counted from rejected/ itself, per source
    rej = pa.concat_tables(pq.read_table(f) for f in (out / "rejected").glob("*.parquet"))
    per_source = {}
    for s in rej.column("source").to_pylist():
        per_source[s.rsplit("/", 1)[-1]] = per_source.get(s.rsplit("/", 1)[-1], 0) + 1
    assert per_source == {"b.csv": 1, "c.csv": 3}
    assert m["rows_rejected"] == 4 == sum(p["rows_rejected"] for p in m["inputs"])
    assert m["rows_read"] == m["rows_written"] + m["rows_rejected"]
