"""Streaming kernels: the linear algebra of the fits and diagnostics over chunks of rows.

Each kernel reads a :data:`~robustmod.kernels.chunks.ChunkSource` (one or more passes) and keeps
only k × k (or p × p) summaries between chunks, so memory is bounded by the chunk, not by n.
"""
from .chunks import Chunk, ChunkSource, array_chunks, rows_per_chunk

__all__ = ["Chunk", "ChunkSource", "array_chunks", "rows_per_chunk"]
