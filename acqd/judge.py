"""The comparator as the step test's consumer sees it: a profile's [dut] table → a function that judges
one record, validated before the bench is touched so a bad table never costs a record or a command.
"""

from __future__ import annotations

from collections.abc import Callable
from typing import Any

from .config import Table
from .compare import CompareSpec, compare_spec, parse_dut_table
from .profile import Profile
from .record import Record

Judge = Callable[[Record], dict[str, Any]]


def make_judge(profile: Profile) -> Judge | None:
    """The comparator for this profile's DUT; None when ``[dut]`` names no model."""
    if "model" not in profile.dut:
        return None
    spec = parse_dut_table(profile.dut, profile.source, profile.text)
    recorded = [c.name for c in profile.acquisition.channels] + [m.name for m in profile.math]
    channels_table = Table(profile.dut.get("channels", {}), profile.source, "dut.channels", profile.text)
    for mapping in spec.channels or ():
        if mapping.channel not in recorded:
            raise channels_table.error(mapping.channel, f"not a channel this profile records; "
                                                        f"it records {', '.join(recorded)}")
    return _warm_judge(spec)


def _warm_judge(spec: CompareSpec) -> Judge:
    """Judge records in turn, each fit starting from the last good fit's values: a run or campaign sees
    the same DUT record after record, so the solver begins next to the answer; the answer itself does
    not depend on it (``compare.fit_parameters``), and a failed fit leaves the next to start as before."""
    previous: dict[str, float] = {}

    def judge(record: Record) -> dict[str, Any]:
        result = compare_spec(record, spec, warm_start=previous)
        if result.fit is not None and result.fit.success:
            previous.clear()
            previous.update(result.fit.values)
        return result.to_dict()

    return judge
