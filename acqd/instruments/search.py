"""Where driver files are found: ``ACQD_DRIVERS``, the repository's ``drivers/`` folder, the installed package.

The canonical files live in ``drivers/`` at the top of the repository (a new instrument is a new file
there). The search order lets a bench keep its own drivers without editing the installation: first every
folder in the ``ACQD_DRIVERS`` environment variable (``os.pathsep``-separated), then ``drivers/`` next to
the package (a source checkout or editable install), then ``acqd/data/drivers`` inside an installed
package. A name found earlier hides the same name later.
"""

from __future__ import annotations

import os
import re
from importlib import resources
from pathlib import Path

from ..errors import ConfigError
from .driver import DriverInfo, driver_info, load_driver

ENVIRONMENT = "ACQD_DRIVERS"
SUFFIX = ".toml"


def driver_dirs() -> list[Path]:
    """The folders searched, in order; folders that do not exist are left out."""
    dirs = [Path(p) for p in os.environ.get(ENVIRONMENT, "").split(os.pathsep) if p]
    dirs.append(Path(__file__).resolve().parents[2] / "drivers")
    dirs.append(Path(str(resources.files("acqd"))) / "data" / "drivers")
    seen: list[Path] = []
    for d in dirs:
        if d.is_dir() and d.resolve() not in [s.resolve() for s in seen]:
            seen.append(d)
    return seen


def _driver_files() -> dict[str, Path]:
    found: dict[str, Path] = {}
    for d in driver_dirs():
        for path in sorted(d.glob(f"*{SUFFIX}")):
            found.setdefault(path.stem, path)
    return found


def find_driver(name_or_path: str | Path, source: str | None = None) -> Path:
    """A driver file by name (``scpi-digitiser``) or by path; ConfigError lists what exists.

    ``source`` is where the name was written (``"night.toml: bench.scope.driver"``), for the message.
    """
    text = str(name_or_path)

    def fail(problem: str) -> ConfigError:
        return ConfigError(source, "", f"{text!r}: {problem}") if source else ConfigError(text, "driver", problem)

    path = Path(text)
    if path.suffix == SUFFIX or os.sep in text or (os.altsep and os.altsep in text):
        if not path.is_file():
            raise fail("driver file not found")
        return path
    files = _driver_files()
    if text not in files:
        where = ", ".join(str(d) for d in driver_dirs()) or "(no driver folder found)"
        raise fail(f"no such driver; available: {', '.join(files) or '(none)'} "
                   f"(searched {where}; add folders with {ENVIRONMENT})")
    return files[text]


def list_drivers() -> list[DriverInfo]:
    """Every driver found, loaded and validated (a broken file is a ConfigError naming it)."""
    return [driver_info(load_driver(path)) for path in _driver_files().values()]


def match_driver(idn: str) -> DriverInfo | None:
    """The first driver, in search order, whose ``idn`` pattern accepts this ``*IDN?`` reply."""
    for driver in list_drivers():
        if re.search(driver.idn_pattern, idn):
            return driver
    return None
