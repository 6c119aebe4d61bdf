"""Index-stream files: an encoder's output (indices and codebook updates) on disk.

One file holds one index stream, so encoding and decoding can run in separate
processes. The byte layout is documented in ``docs/index-file.md``; in short,
everything is little-endian::

    preamble   magic "SQ-INDEX", format version (u32), header length (u32)
    header     UTF-8 JSON: the whole StreamSpec of the index stream
    header CRC CRC-32 of version, length and header bytes
    records    type (u32), body length (u32), body, CRC-32 of type+length+body
               1 = codebook, 2 = index chunk, 3 = end (always last, fixed size)

Writing is O(block) and never leaves a half-written file under the final
name (:class:`IndexWriter`); reading is streaming with memory bounded by one
record, and every record is checked as it is read (:class:`IndexReader`).
Both raise :class:`~streamq.errors.StreamqError` with a one-line message that
names the file and the byte offset or sample at fault.

Channels are numbered from 0 in the file and in messages, as on the wire.
"""

from __future__ import annotations

from streamq.engine.indexio.layout import FORMAT_VERSION, MAGIC
from streamq.engine.indexio.reader import IndexReader, read_spec
from streamq.engine.indexio.writer import IndexWriter

__all__ = ["IndexWriter", "IndexReader", "read_spec", "MAGIC", "FORMAT_VERSION"]
