"""One module per ``annotator`` sub-command, each with ``add_arguments(parser)`` and
``main(args) -> int``. The CLI imports a module only when its command is used."""

COMMANDS = {
    "run": "annotate catalogues (Parquet, CSV, CSV.gz, FITS binary tables, folders of them)",
    "plugins": "list registered annotators, where they come from and what they add",
    "query": "run SQL on an annotated output (DuckDB)",
    "describe": "columns, units, cosmology, counts and flags of an annotated output",
    "export": "export an annotated output to a DuckDB database file",
    "report": "write a self-contained HTML report of an annotated output",
    "serve": "run the batch service (HTTP JSON API, status page, job ledger, workers)",
    "submit": "submit a job file to a running service",
    "jobs": "list the jobs of a running service",
    "abort": "abort a job of a running service",
    "delete": "delete a finished job (and its output folder) from a running service",
}
