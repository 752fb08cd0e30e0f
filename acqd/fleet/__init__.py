"""Many benches, one archive: ``sync`` copies each bench's finished segments to an fsspec URL (verified,
once each), ``background`` does it from inside the daemon, ``analysis`` reads the archive on
dask.distributed (``acqd fleet``).

Nothing below the daemon imports this package; the daemon reaches it only through
``start_background_sync`` (lazily, when ``--sync`` is given), so the store and campaign layers do not
depend on fsspec or dask.
"""

from .background import start_background_sync

__all__ = ["start_background_sync"]
