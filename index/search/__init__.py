"""Queries against the stores: nearest neighbours, explanations of a match, channel exemplars."""
