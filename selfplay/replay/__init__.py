"""Replay storage: the record format, shards and catalog on disk, the in-RAM replay buffer, and
the path to any downstream trainer (format spec: docs/record-format.md).

Modules, one concern each:

- :mod:`~selfplay.replay.codec`    shard header, frames, msgpack encoding of a record, limits
- :mod:`~selfplay.replay.shards`   write a shard atomically, read / scan one with every check
- :mod:`~selfplay.replay.catalog`  the SQLite catalog (games, shards, quarantine, counters)
- :mod:`~selfplay.replay.store`    :class:`RecordStore`: durable journal, shards, exactly-once ids, recovery
- :mod:`~selfplay.replay.buffer`   :class:`ReplayBuffer`: the window of the newest positions
- :mod:`~selfplay.replay.batch`    compact positions -> planes, policy, mask, value (+ symmetry)
- :mod:`~selfplay.replay.reader`   :class:`RunReader`: records and batches of a run, follow mode
- :mod:`~selfplay.replay.dataset`  :class:`ReplayDataset`: a torch IterableDataset (imports torch)
- :mod:`~selfplay.replay.export`   ``selfplay export``: positions as .npz arrays
- :mod:`~selfplay.replay.sgf_records`  Go records to SGF files, SGF games to supervised records
- :mod:`~selfplay.replay.synthetic`    random legal games for benchmarks and tests
- :mod:`~selfplay.replay.config`   the ``[replay]`` section of run.toml
"""
