"""The Ray layer: actors wrapping the :mod:`selfplay` library, the launcher behind
``selfplay run``, fault handling, and deploy files for a Ray cluster."""
