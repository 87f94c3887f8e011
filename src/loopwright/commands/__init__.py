"""Sub-commands of the ``loopwright`` command line, one module each.

A module here defines ``register(subparsers)`` which adds one parser and sets
``func=...`` (a callable taking the parsed args and returning an exit code).
"""
