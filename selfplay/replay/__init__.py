"""Replay storage: record format, shards and catalog on disk, the in-RAM replay buffer, and
the reader/export path to any downstream trainer. See docs/record-format.md."""
