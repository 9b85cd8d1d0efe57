"""plyfoundry's library: games, guided search, records, replay storage, learner and metrics.

This package never imports Ray; the Ray layer lives in the sibling package ``cluster``.
"""

__version__ = "0.1.0"
