"""The profile's ``[campaign]`` table, validated into a frozen ``CampaignSpec``.

Schema (every error names the file, line, key and what is allowed; unknown keys are errors)::

    [campaign]
    name = "night-kt9"            # default: the profile file's stem; letters, digits, '.', '_', '-'
    every_s = 600                 # how often: an interval in seconds ...
    # cron = "*/10 22-23,0-6 * * *"   # ... or a crontab line (minute hour day month weekday) ...
    # back_to_back = true         # ... or each slot as soon as the previous one ended
    # timezone = "Europe/Berlin"  # cron only; default: the machine's local time zone
    # start = 2026-12-02T22:00:00+01:00   # first slot no earlier than this; default: when first started
    slots = 48                    # how many slots ...
    # until = 2026-12-03T06:00:00+01:00   # ... or until when (exactly one of the two)
    late_slots = "run_latest"     # a slot whose time passed while the daemon was down or busy:
                                  #   run_latest = run it once now, late; skip = record it missed
    # lateness_limit_s = 300      # skip only: how late a slot may still start (default: half the interval,
                                  #   60 s for cron)
    retries = 3                   # failed attempts retried per slot, each after reconnecting the bench
    retry_backoff_s = 2.0         # wait before the first retry; doubles on each further one
    keep_open_s = 60.0            # keep the bench open between slots less than this far apart

    [campaign.sweep]              # optional: each slot runs one step test per setting (the Cartesian
    high_v = [0.5, 1.0, 1.5]      #   product of the lists, in the order written), one record each
    edge = ["rising", "falling"]

A slot is one point of the schedule: slot n of an interval campaign is due at start + (n-1)·every_s, and
its number never changes, so a missed slot stays missed (recorded) instead of shifting the rest.
"""

from __future__ import annotations

import itertools
import json
import re
import zoneinfo
from dataclasses import dataclass, replace
from datetime import datetime, tzinfo
from typing import Any

import tzlocal
from apscheduler.triggers.cron import CronTrigger

from ..config import Table
from ..errors import ConfigError
from ..batch import unit_profile
from ..profile import Batch, BatchUnit, Profile, StimulusPlan
from ..record import EDGES, LOADS

SCHEDULES = ("interval", "cron", "back_to_back")
LATE_SLOT_POLICIES = ("run_latest", "skip")
SWEEP_NUMBERS = {"low_v": "V", "high_v": "V", "frequency_hz": "Hz"}
SWEEP_KEYS = (*SWEEP_NUMBERS, "edge", "load")
_NAME = re.compile(r"^[A-Za-z0-9][A-Za-z0-9._-]{0,63}$")
CRON_LATENESS_LIMIT_S = 60.0


@dataclass(frozen=True)
class Step:
    """One step test of a slot: a stimulus setting and one edge, so exactly one record.

    ``profile`` is the campaign's profile with this step's stimulus, ready for ``run_step_test``. In a
    batch every unit has its own steps: ``unit`` is the unit the switch connects for it, and ``profile``
    carries that unit's serial and nominal values.
    """

    number: int
    label: str
    setting: dict[str, Any]
    profile: Profile
    unit: BatchUnit | None = None


@dataclass(frozen=True)
class CampaignSpec:
    name: str
    profile: Profile
    schedule: str  # one of SCHEDULES
    every_s: float | None
    cron: str | None
    timezone: tzinfo
    start: datetime | None
    slots: int | None
    until: datetime | None
    late_slots: str
    lateness_limit_s: float
    retries: int
    retry_backoff_s: float
    keep_open_s: float
    steps: tuple[Step, ...]
    table_json: str  # the [campaign] table as canonical JSON: a restart must find the same one

    @property
    def source(self) -> str:
        return self.profile.source

    def cron_trigger(self, start: datetime | None = None, end: datetime | None = None) -> CronTrigger:
        """The crontab line as APScheduler's CronTrigger.from_crontab reads it, with a start and an end."""
        assert self.cron is not None
        minute, hour, day, month, day_of_week = self.cron.split()
        return CronTrigger(minute=minute, hour=hour, day=day, month=month, day_of_week=day_of_week,
                           timezone=self.timezone, start_date=start, end_date=end)


def load_campaign(profile: Profile) -> CampaignSpec:
    """The campaign of ``profile``, or one ConfigError line naming the file, line and key."""
    if not profile.campaign:
        raise ConfigError(profile.source, "campaign",
                          "missing; the daemon needs a [campaign] table, e.g. every_s = 600 and slots = 48")
    t = Table(profile.campaign, profile.source, "campaign", profile.text)
    name = _name(t, profile)
    schedule = _schedule_kind(t)
    every_s = t.number("every_s", None, positive=True, unit="s") if schedule == "interval" else None
    if every_s is not None and every_s < 1e-3:
        raise t.error("every_s", f"must be at least 0.001 s, not {every_s!r}")
    zone = _timezone(t, schedule)
    cron = _cron(t, zone) if schedule == "cron" else None
    if schedule == "back_to_back":
        t.boolean("back_to_back")
    start = t.moment("start")
    slots, until = _extent(t, start)
    late_slots = t.string("late_slots", "run_latest", choices=LATE_SLOT_POLICIES)
    lateness_limit = _lateness_limit(t, schedule, late_slots, every_s)
    retries = t.integer("retries", 3, min=0, max=100)
    backoff = t.number("retry_backoff_s", 2.0, min=0.0, unit="s")
    keep_open = t.number("keep_open_s", 60.0, min=0.0, unit="s")
    steps = _steps(t.table("sweep", {}), profile)
    t.done()
    return CampaignSpec(name, profile, schedule, every_s, cron, zone, start, slots, until, late_slots, lateness_limit,
                        retries, backoff, keep_open, steps, canonical_json(profile.campaign))


def canonical_json(table: dict[str, Any]) -> str:
    """The table as sorted JSON (datetimes as ISO text), for 'has this campaign changed?' checks."""
    return json.dumps(table, sort_keys=True, default=lambda v: v.isoformat())


def _name(t: Table, profile: Profile) -> str:
    name = t.string("name", profile.path.stem)
    if not _NAME.match(name):
        raise t.error("name", f"{name!r} must be 1-64 letters, digits, '.', '_' or '-' (it names the record "
                              "file); set [campaign] name = \"...\"")
    return name


def _schedule_kind(t: Table) -> str:
    given = [key for key in ("every_s", "cron", "back_to_back") if t.has(key)]
    if len(given) != 1:
        problem = "none given" if not given else f"{' and '.join(given)} given"
        raise t.error(given[-1] if given else "every_s",
                      f"give exactly one of every_s (seconds), cron (crontab line) or back_to_back = true; "
                      f"{problem}")
    if given[0] == "back_to_back" and t.data["back_to_back"] is not True:
        raise t.error("back_to_back", f"must be true when given (use every_s or cron otherwise), "
                                      f"not {t.data['back_to_back']!r}")
    return {"every_s": "interval", "cron": "cron", "back_to_back": "back_to_back"}[given[0]]


def _timezone(t: Table, schedule: str) -> tzinfo:
    if not t.has("timezone"):
        return tzlocal.get_localzone()
    name = t.string("timezone")
    if schedule != "cron":
        raise t.error("timezone", "only with cron (intervals and start/until times carry their own offset)")
    try:
        return zoneinfo.ZoneInfo(name)
    except (zoneinfo.ZoneInfoNotFoundError, ValueError):
        raise t.error("timezone", f"unknown time zone {name!r}; use an IANA name such as 'Europe/Berlin' "
                                  "or 'UTC'") from None


def _cron(t: Table, zone: tzinfo) -> str:
    expr = t.string("cron")
    fields = expr.split()
    if len(fields) != 5:
        raise t.error("cron", f"invalid cron expression {expr!r}: {len(fields)} fields; must be 5 "
                              "(minute hour day-of-month month day-of-week), e.g. '*/10 * * * *'")
    # Cron dialects disagree on weekday numbers (0 = Sunday in crontab, 0 = Monday in APScheduler 3's
    # from_crontab); names mean the same everywhere, so numbers are refused rather than misread.
    if re.search(r"\d", fields[4]):
        raise t.error("cron", f"invalid cron expression {expr!r}: write the day of the week as names "
                              "(mon-fri, sat,sun or *), because weekday numbers differ between cron dialects")
    try:
        CronTrigger.from_crontab(expr, timezone=zone)
    except (ValueError, TypeError, KeyError) as exc:
        raise t.error("cron", f"invalid cron expression {expr!r}: {exc}") from None
    return expr


def _extent(t: Table, start: datetime | None) -> tuple[int | None, datetime | None]:
    if t.has("slots") == t.has("until"):
        raise t.error("slots", "give exactly one of slots (how many) or until (a date-time); "
                               + ("both given" if t.has("slots") else "none given"))
    if t.has("slots"):
        return t.integer("slots", min=1), None
    until = t.moment("until")
    if start is not None and until <= start:
        raise t.error("until", f"must be after start ({start.isoformat()}), not {until.isoformat()}")
    return None, until


def _lateness_limit(t: Table, schedule: str, late_slots: str, every_s: float | None) -> float:
    if not t.has("lateness_limit_s"):
        return every_s / 2 if every_s is not None else CRON_LATENESS_LIMIT_S
    if schedule == "back_to_back" or late_slots != "skip":
        raise t.error("lateness_limit_s", "only with late_slots = \"skip\" on an every_s or cron schedule")
    return t.number("lateness_limit_s", positive=True, unit="s")


def _steps(sweep: Table, profile: Profile) -> tuple[Step, ...]:
    """Every (setting, edge) a slot runs, each checked against the profile's limits before anything starts."""
    lists: dict[str, list[Any]] = {}
    for key in list(sweep.data):
        if key not in SWEEP_KEYS:
            raise sweep.error(key, f"cannot be swept; allowed: {', '.join(SWEEP_KEYS)}")
        lists[key] = _sweep_values(sweep, key)
    sweep.done()
    edges_swept = "edge" in lists
    steps: list[Step] = []
    for combination in itertools.product(*lists.values()) if lists else [()]:
        setting = dict(zip(lists, combination))
        stimulus = _swept_stimulus(sweep, profile, setting)
        for edge in ((setting["edge"],) if edges_swept else stimulus.edges):
            plan = replace(stimulus, edges=(edge,))
            step_setting = {**setting, "edge": edge}
            steps.append(Step(len(steps) + 1, _label(step_setting), step_setting, replace(profile, stimulus=plan)))
    return tuple(steps) if profile.batch is None else _unit_steps(steps, profile.batch)


def _unit_steps(steps: list[Step], batch: Batch) -> tuple[Step, ...]:
    """Every step on every unit, unit by unit (one pass of the switch per slot), numbered anew."""
    per_unit = [(unit, step) for unit in batch.units for step in steps]
    return tuple(Step(n, f"{unit.serial}, {step.label}", {**step.setting, "serial": unit.serial},
                      unit_profile(step.profile, unit), unit) for n, (unit, step) in enumerate(per_unit, start=1))


def _label(setting: dict[str, Any]) -> str:
    """``high_v=1.5 V, rising``: how a step is named in the run log and the live view."""
    parts = [f"{k}={v:g} {SWEEP_NUMBERS[k]}" for k, v in setting.items() if k in SWEEP_NUMBERS]
    if "load" in setting:
        parts.append(f"load={setting['load']}")
    return ", ".join([*parts, setting["edge"]])


def _sweep_values(sweep: Table, key: str) -> list[Any]:
    values = sweep.raw(key)
    if not isinstance(values, list) or not values:
        raise sweep.error(key, f"must be a non-empty list, e.g. {key} = "
                               + ("[0.5, 1.0]" if key in SWEEP_NUMBERS else f"{list(EDGES if key == 'edge' else LOADS)}"))
    allowed = {"edge": EDGES, "load": LOADS}.get(key)
    for value in values:
        if allowed is not None and value not in allowed:
            raise sweep.error(key, f"values must be among {', '.join(allowed)}, not {value!r}")
        if allowed is None and (isinstance(value, bool) or not isinstance(value, (int, float))):
            raise sweep.error(key, f"values must be numbers ({SWEEP_NUMBERS[key]}), not {value!r}")
    if len(set(values)) != len(values):
        raise sweep.error(key, f"lists a value twice: {values}")
    return [float(v) if allowed is None else v for v in values]


def _swept_stimulus(sweep: Table, profile: Profile, setting: dict[str, Any]) -> StimulusPlan:
    """The profile's stimulus with one setting applied, refused if it breaks a limit the profile states."""
    overrides = {k: v for k, v in setting.items() if k != "edge"}
    plan = replace(profile.stimulus, **overrides)
    key = next(iter(overrides), "edge")
    what = ", ".join(f"{k}={v}" for k, v in setting.items())
    if plan.high_v <= plan.low_v:
        raise sweep.error(key, f"setting ({what}) has high_v {plan.high_v:g} V not above low_v {plan.low_v:g} V")
    peak = max(abs(plan.low_v), abs(plan.high_v))
    if peak > profile.limits.max_level_v:
        raise sweep.error(key, f"setting ({what}) puts a level at {peak:g} V, over limits.max_level_v = "
                               f"{profile.limits.max_level_v:g} V; nothing was scheduled")
    if not 0 < plan.frequency_hz <= profile.limits.max_frequency_hz:
        raise sweep.error(key, f"setting ({what}) has frequency {plan.frequency_hz:g} Hz; must be above 0 and at "
                               f"most limits.max_frequency_hz = {profile.limits.max_frequency_hz:g} Hz")
    level = profile.acquisition.trigger_level_v
    if level is not None and not plan.low_v < level < plan.high_v:
        raise sweep.error(key, f"setting ({what}) does not straddle acquisition.trigger_level_v = {level:g} V, "
                               "so the scope would never trigger")
    return plan

