"""acqd: automated step tests on the electronics bench.

The data path runs transport (``acqd.visa``) → instrument roles (``acqd.instruments``) →
step test (``acqd.steptest``) → record store (``acqd.store``) → comparator (``acqd.compare``) →
campaign (``acqd.campaign``), with the simulated bench and replay (``acqd.sim``) beside it.
"""

__version__ = "0.1.0"
