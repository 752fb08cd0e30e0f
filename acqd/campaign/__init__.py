"""Campaigns: step tests on a schedule, run by a daemon that survives kills and restarts.

``spec`` reads the profile's [campaign] table, ``grid`` numbers the slots, ``scheduler`` wires APScheduler
(SQLite job store beside the records), ``runner`` runs one campaign's slots (retries, comparator, store),
``ledger`` and ``runlog`` remember what happened, ``daemon`` ties them together, ``status`` and ``drift``
read a night's results.
"""

from .spec import CampaignSpec, Step, load_campaign

__all__ = ["CampaignSpec", "Step", "load_campaign"]
