"""A layer's vectors on disk (segment files) and in memory (FAISS): index types, writer, rebuild, reader."""
