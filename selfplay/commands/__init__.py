"""One module per ``selfplay`` subcommand; each exposes ``register(subparsers)``."""
