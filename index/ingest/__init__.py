"""Files -> catalog rows and stored descriptors: scan, decode workers, the indexing job, check and repair."""
