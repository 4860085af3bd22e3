"""kinscope engine: index image archives by CNN layer descriptors and search them by example."""

__version__ = "0.1.0"
