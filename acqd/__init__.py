"""acqd: automated step tests on the electronics bench.

The data path runs transport (``acqd.visa``) → instrument roles (``acqd.instruments``) →
step test (``acqd.steptest``) → record store (``acqd.store``) → comparator (``acqd.compare``) →
campaign (``acqd.campaign``), with the simulated bench and replay (``acqd.sim``) beside it.
"""

import os

# The matrices here are tiny (2x2 to 8x8): a threaded BLAS spends far longer waking threads than computing,
# and on a 2-core bench PC a 4x4 matrix exponential measured 5-13 ms threaded against 40 us single-threaded.
# Set before numpy is first imported (the command line and the daemon import acqd first); a value the user
# set wins.
os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")

__version__ = "0.1.0"
