"""nightplan: queue-mode observatory night scheduler."""

__version__ = "0.1.0"
