"""Command groups of the ``lethe`` CLI; each module exposes ``register(subparsers)``."""
