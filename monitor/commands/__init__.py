"""One module per `lotwarden` sub-command: ``register(subparsers)`` and ``run(args) -> int``."""
