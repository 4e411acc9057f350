"""Engines drive the same pipeline over a catalogue: ``local`` (threads on one machine) and
``dask`` (an existing Dask cluster). Both use :mod:`annotator.engines.common` for the unit of
work (one chunk -> one committed part), so results are identical."""
