"""The invented Quillfield Deep Survey: generator, demo and sample files (see README.md)."""
