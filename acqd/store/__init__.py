"""The HDF5 record store: append-only, crash-safe, rotated into plain files, readable while it grows.

Public API::

    with RecordStore("data/night.h5") as store:      # fsync=True, rotate_records=1000
        i = store.append(record)                     # returns once the record is durable
    with open_records("data/night.h5") as reader:
        reader.index(); reader.read(i); reader.analyses(); len(reader); list(reader)
    export_csv(reader, i, "out.csv")

Why this layout - the measurements are quoted in DEVELOPERS.md, "The store" (taken on a machine like ours):

* Pre-created, resizable, chunked datasets (one chunk per channel of a record), plus a parallel index
  dataset of fixed-size rows. Precisely timed kills lost acknowledged records in about a fifth of the
  trials with one group per record, and none with growing datasets in SWMR mode; appending to a growing
  dataset also kept the per-record time flat up to 50,000 records.
* SWMR on the live file: after a kill it opens directly with ``swmr=True`` (no ``h5clear``), and it is the
  only way a second process can read while the writer appends.
* ``libver=("v110", "v110")``: SWMR needs the 1.10 format, and capping it at 1.10 keeps every file
  readable by HDF5 1.10 tools (Debian's h5dump) although h5py bundles HDF5 2.0.
* Per record: data, flush, index row, flush, ``os.fsync`` - HDF5's flush only calls pwrite, so without
  the fsync a power cut can lose acknowledged records. Every row, blob and sample chunk carries a CRC-32,
  because one timed kill in sixty left wrong data that only a CRC caught.
* Samples go in with ``write_direct_chunk``, one chunk per channel straight from the channel's array
  (no copy, no chunk cache). Side by side with a plain ``write()`` + fsync per 1.6 MB record, a bare
  direct-chunk loop ran at 0.78-1.01x and ``ds[i] = x`` at 0.60-0.94x here. The whole store adds a CRC-32
  of the samples (~0.4 ms per 1.6 MB, the largest CPU cost left) and the index row; ``bench/store.py``
  prints its ratio (0.39-0.62 on this shared VM while other jobs kept both cores busy).
* Rotation into finished files (every N records, on a change of record shape, on close) caps what a
  damaged live file can put at risk and leaves closed, plain HDF5 files for every other tool.
* No compression: lzf and gzip-1 cut throughput 7-30x for a 13-40 % smaller file.

Modules: ``schema`` (what a segment holds, Record <-> row/blobs), ``naming`` (store path -> segment files,
durable renames), ``segment`` (write/read one segment file), ``writer`` (RecordStore), ``reader``
(RecordReader), ``recovery`` (finishing a dead writer's segment in a child process), ``export`` (CSV),
``faults`` (the kill switch the crash tests use). The schema is described in the README ("The record file").
"""

from .export import export_csv
from .reader import RecordAnalysis, RecordReader, RecordSummary, open_records
from .writer import RecordStore

__all__ = ["RecordAnalysis", "RecordReader", "RecordStore", "RecordSummary", "export_csv", "open_records"]
