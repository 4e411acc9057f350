"""The absolute-magnitude figure's bookkeeping: which flags concern a band, which sampled rows
carry them, and counts over every row (consistency checks against hand-made tables)."""

from __future__ import annotations

from types import SimpleNamespace

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq

from annotator.report import figures
from annotator.report.data import band_counts, band_flag_names, flagged_in_sample

KNOWN = ["kcorrection_amber_colour_clipped", "kcorrection_amber_colour_outside_range",
         "kcorrection_amber_from_crimson_colour_clipped", "magnitude_amber_missing",
         "magnitude_amber_from_crimson_missing", "redshift_missing",
         "redshift_pdf_secondary_peak", "redshift_pdf_magnitude_partial", "sentinel_mag_amber"]


def test_flags_of_a_band_exclude_a_longer_band_named_after_it():
    # a band's own flags and the row flags that cast doubt on M, never another band's nor
    # the posterior's own (redshift_pdf_magnitude_partial)
    bands = ["amber", "amber_from_crimson"]
    assert band_flag_names("amber", bands, KNOWN) == [
        "kcorrection_amber_colour_clipped", "kcorrection_amber_colour_outside_range",
        "magnitude_amber_missing", "redshift_missing", "redshift_pdf_secondary_peak",
        "sentinel_mag_amber"]
    assert band_flag_names("amber_from_crimson", bands, KNOWN) == [
        "kcorrection_amber_from_crimson_colour_clipped", "magnitude_amber_from_crimson_missing",
        "redshift_missing", "redshift_pdf_secondary_peak", "sentinel_mag_amber"]


def test_posterior_summaries_are_not_bands_of_their_own():
    from annotator.report.data import _bands

    names = ["absolute_magnitude_amber_mag", "absolute_magnitude_amber_err_mag",
             "absolute_magnitude_amber_p16_mag", "absolute_magnitude_amber_mean_mag",
             "absolute_magnitude_wide_mean_mag"]  # no absolute_magnitude_wide_mag: a band
    schema = pa.schema([(n, pa.float64()) for n in names])
    assert _bands({}, schema) == {"amber": "absolute_magnitude_amber_mag",
                                  "wide_mean": "absolute_magnitude_wide_mean_mag"}


def test_sampled_rows_and_whole_output_counts(tmp_path):
    names = band_flag_names("amber", ["amber", "amber_from_crimson"], KNOWN)
    flags = ["", "kcorrection_amber_colour_clipped",
             "kcorrection_amber_from_crimson_colour_clipped",
             "redshift_missing;kcorrection_amber_colour_outside_range", "",
             "kcorrection_amber_colour_outside_range"]
    m = [-20.0, -21.0, -19.0, None, None, None]
    mu = [40.0, 41.0, 42.0, None, 43.0, 44.0]
    assert flagged_in_sample(np.array(flags, dtype=object), names).tolist() == \
        [False, True, False, True, False, True]
    table = pa.table({"absolute_magnitude_amber_mag": pa.array(m, pa.float64()),
                      "distance_modulus_mag": pa.array(mu, pa.float64()),
                      "annotation_flags": pa.array(flags)})
    path = tmp_path / "part.parquet"
    pq.write_table(table, path)
    out = SimpleNamespace(parts=[path], schema=table.schema,
                          has=lambda c: c in table.schema.names)
    c = band_counts(out, "absolute_magnitude_amber_mag", names)
    # 3 values (1 flagged); of the 3 nulls, one has no distance (not the band's refusal),
    # one is refused with a flag, one is null without a flag of the band
    assert (c.given, c.given_flagged, c.null_flagged, c.null_unflagged) == (3, 1, 1, 1)
    png = figures.absolute_magnitudes(
        np.array([0.1, 0.5, 1.0]), {"amber": np.array([-20.0, -21.0, -19.0])},
        {"amber": np.array([False, True, False])}, {"amber": c})
    assert png[:8] == b"\x89PNG\r\n\x1a\n"
