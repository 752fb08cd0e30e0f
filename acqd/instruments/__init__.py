"""Instrument roles and the driver files that make a model play them.

``open_instrument(resource, driver)`` gives a ``Generator``, a ``Scope`` or a ``Switch``; the driver file (TOML, see
"How to add a driver" in DEVELOPERS.md) says which SCPI commands the model uses. ``find_driver``,
``list_drivers`` and ``match_driver`` look drivers up without touching an instrument.
"""

from .driver import Driver, DriverInfo, load_driver
from .roles import Generator, Scope, Switch, open_instrument
from .search import driver_dirs, find_driver, list_drivers, match_driver

__all__ = ["Driver", "DriverInfo", "Generator", "Scope", "Switch", "driver_dirs", "find_driver", "list_drivers",
           "load_driver", "match_driver", "open_instrument"]
