"""One module per CLI verb. Each exposes ``register(subparsers)`` and a handler that calls a
library function; the handler returns the exit code."""
