"""Pixels from files: safe decoding, metadata, network input, renditions for people to look at."""
