"""The collection map: items laid out in 2-D by similarity (layout.py: the method; collection.py: stored per
layer, brought up to date as items arrive). See docs/map.md."""
