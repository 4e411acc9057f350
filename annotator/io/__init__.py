"""Streaming readers, the atomic part writer, checkpoints and small data tables."""
