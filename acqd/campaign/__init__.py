"""Campaigns: step tests on a schedule, run by a daemon that survives kills and restarts.

``spec`` reads the profile's [campaign] table, ``grid`` numbers the slots, ``scheduler`` wires APScheduler
(SQLite job store beside the records), ``runner`` runs one campaign's slots (retries, store), ``keeper``
stores and books its records, ``comparing`` runs its comparator in a worker process, ``ledger`` and
``runlog`` remember what happened, ``daemon`` ties them together, ``status`` and ``drift`` read a night's
results.
"""

from .spec import CampaignSpec, Step, load_campaign

__all__ = ["CampaignSpec", "Step", "load_campaign"]
