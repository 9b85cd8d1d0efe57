"""The roles of a run, each one class that owns its state, its timers and its metric lines:

- :class:`selfplay.roles.selfplay.SelfPlayRole` — one self-play worker (G games at once);
- :class:`selfplay.roles.buffer.BufferRole` — one replay buffer shard (record store + window);
- :class:`selfplay.roles.learner.LearnerRole` — training and snapshot publishing by the learner;
- :class:`selfplay.roles.snapshots.SnapshotServerRole` — version 1, following the snapshot
  store, serving the newest weights to workers.

:mod:`selfplay.roles.run` holds what both orchestrators share (run lines, stop conditions, game
budget, closing summary) and :mod:`selfplay.roles.runlock` the run directory's lock. The roles
never import Ray: :class:`selfplay.loop.LocalRun` composes them in one process and
``cluster/actors.py`` wraps each in a Ray actor shell.
"""
