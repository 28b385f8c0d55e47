"""One module per ``ratefit`` subcommand; each exposes ``register(subparsers)``."""
