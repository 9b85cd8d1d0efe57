"""Monitoring of a run: status figures, live views, Prometheus endpoint, reports and position views.

Everything here reads the run directory only (metrics.jsonl, catalog.sqlite, snapshots/,
shards/), so it works from any machine that can read that folder. Field names and derived
figures are documented in docs/metrics.md.
"""
