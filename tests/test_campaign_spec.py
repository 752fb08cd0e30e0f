"""The [campaign] table and the slot grid: what is accepted, what is refused (one line naming file, line
and key), and when each slot is due."""

from datetime import UTC, datetime, timedelta
from pathlib import Path

import pytest

from acqd.campaign.grid import BackToBackGrid, CronGrid, IntervalGrid, make_grid
from acqd.campaign.spec import load_campaign
from acqd.errors import ConfigError
from acqd.profile import load_profile

DEMO = Path(__file__).resolve().parents[1] / "profiles" / "demo-bridge-filter.toml"


def profile_with(tmp_path: Path, campaign: str, name: str = "night.toml"):
    path = tmp_path / name
    path.write_text(DEMO.read_text() + "\n[campaign]\n" + campaign)
    return load_profile(path)


def test_interval_campaign_with_sweep_expands_to_one_step_per_setting_and_edge(tmp_path: Path) -> None:
    spec = load_campaign(profile_with(tmp_path, 'every_s = 600\nslots = 48\n'
                                                '[campaign.sweep]\nhigh_v = [0.5, 1.0]\nedge = ["rising", "falling"]\n'))
    assert (spec.name, spec.schedule, spec.every_s, spec.slots, spec.late_slots) == ("night", "interval", 600.0, 48,
                                                                                  "run_latest")
    # Cartesian product in the order written: (0.5, rising), (0.5, falling), (1.0, rising), (1.0, falling)
    assert [(s.profile.stimulus.high_v, s.profile.stimulus.edges) for s in spec.steps] == [
        (0.5, ("rising",)), (0.5, ("falling",)), (1.0, ("rising",)), (1.0, ("falling",))]
    assert [s.number for s in spec.steps] == [1, 2, 3, 4]
    assert spec.steps[2].label == "high_v=1 V, rising"
    assert spec.lateness_limit_s == 300.0  # default: half the interval


def test_without_sweep_each_profile_edge_is_a_step(tmp_path: Path) -> None:
    profile = profile_with(tmp_path, "back_to_back = true\nslots = 3\n")
    assert load_campaign(profile).steps[0].profile.stimulus.edges == ("rising",)
    both = tmp_path / "both.toml"
    both.write_text(profile.text.replace('edge = "rising"', 'edge = "both"'))
    spec = load_campaign(load_profile(both))
    assert [s.setting["edge"] for s in spec.steps] == ["rising", "falling"]


def test_until_and_start_take_toml_datetimes(tmp_path: Path) -> None:
    spec = load_campaign(profile_with(tmp_path, 'cron = "*/10 22-23,0-6 * * *"\ntimezone = "Europe/Berlin"\n'
                                                "start = 2026-12-02T22:00:00+01:00\nuntil = 2026-12-03T06:00:00+01:00\n"))
    assert spec.until == datetime(2026, 12, 3, 5, 0, tzinfo=UTC)
    assert spec.start == datetime(2026, 12, 2, 21, 0, tzinfo=UTC)
    assert spec.slots is None


# (campaign table, words the one-line message must contain)
BAD = [
    ("every_s = 0\nslots = 3\n", ["campaign.every_s", "greater than 0"]),
    ("every_s = -60\nslots = 3\n", ["campaign.every_s", "greater than 0"]),
    ('every_s = "10 min"\nslots = 3\n', ["campaign.every_s", "finite number"]),
    ('cron = "61 * * * *"\nslots = 3\n', ["campaign.cron", "invalid cron expression", "61"]),
    ('cron = "*/5 * * *"\nslots = 3\n', ["campaign.cron", "4 fields", "must be 5"]),
    ('cron = "0 2 * * 1-5"\nslots = 3\n', ["campaign.cron", "day of the week as names"]),
    ('cron = "0 2 * * mon"\ntimezone = "Mars/Olympus"\nslots = 3\n', ["campaign.timezone", "unknown time zone"]),
    ('every_s = 60\ncron = "* * * * *"\nslots = 3\n', ["give exactly one of every_s", "every_s and cron given"]),
    ("slots = 3\n", ["campaign.every_s", "give exactly one of", "none given"]),
    ("back_to_back = false\nslots = 3\n", ["campaign.back_to_back", "must be true"]),
    ("every_s = 60\n", ["campaign.slots", "exactly one of slots", "none given"]),
    ("every_s = 60\nslots = 3\nuntil = 2026-12-03T06:00:00Z\n", ["campaign.slots", "both given"]),
    ("every_s = 60\nslots = 0\n", ["campaign.slots", "at least 1"]),
    ('every_s = 60\nuntil = "tomorrow"\n', ["campaign.until", "ISO 8601"]),
    ("every_s = 60\nuntil = 2026-12-03\n", ["campaign.until", "date without a time"]),
    ("every_s = 60\nstart = 2026-12-03T06:00:00Z\nuntil = 2026-12-03T05:00:00Z\n", ["campaign.until", "after start"]),
    ('every_s = 60\nslots = 3\nlate_slots = "later"\n', ["campaign.late_slots", "run_latest, skip"]),
    ("every_s = 60\nslots = 3\nlateness_limit_s = 5\n", ["campaign.lateness_limit_s", "only with late_slots"]),
    ("every_s = 60\nslots = 3\nretries = -1\n", ["campaign.retries", "from 0 to 100"]),
    ('every_s = 60\nslots = 3\nname = "night run"\n', ["campaign.name", "letters, digits"]),
    ("every_s = 60\nslots = 3\nevery_hours = 2\n", ["campaign.every_hours", "unknown key"]),
    ("every_s = 60\nslots = 3\n[campaign.sweep]\nhigh_v = [1.0, 2.5]\n",
     ["campaign.sweep.high_v", "2.5 V", "max_level_v", "nothing was scheduled"]),
    ("every_s = 60\nslots = 3\n[campaign.sweep]\nhigh_v = [1.0, -0.5]\n", ["campaign.sweep.high_v", "not above low_v"]),
    ("every_s = 60\nslots = 3\n[campaign.sweep]\nhigh_v = []\n", ["campaign.sweep.high_v", "non-empty list"]),
    ('every_s = 60\nslots = 3\n[campaign.sweep]\nedge = ["up"]\n', ["campaign.sweep.edge", "rising, falling"]),
    ("every_s = 60\nslots = 3\n[campaign.sweep]\nsamples = [100]\n", ["campaign.sweep.samples", "cannot be swept"]),
    ("every_s = 60\nslots = 3\n[campaign.sweep]\nfrequency_hz = [100.0, 20e3]\n",
     ["campaign.sweep.frequency_hz", "max_frequency_hz"]),
]


@pytest.mark.parametrize("table,words", BAD, ids=[" ".join(w[:2]) for _, w in BAD])
def test_bad_campaign_table_is_one_line(tmp_path: Path, table: str, words: list[str]) -> None:
    profile = profile_with(tmp_path, table)
    with pytest.raises(ConfigError) as info:
        load_campaign(profile)
    message = str(info.value)
    assert "\n" not in message
    assert message.startswith(str(profile.path))
    for word in words:
        assert word in message, message


def test_error_gives_the_line_of_the_key(tmp_path: Path) -> None:
    profile = profile_with(tmp_path, "slots = 3\nevery_s = 0\n")
    expected = 1 + profile.text.splitlines().index("every_s = 0")
    with pytest.raises(ConfigError, match=f"line {expected}: campaign.every_s"):
        load_campaign(profile)


def test_no_campaign_table(tmp_path: Path) -> None:
    with pytest.raises(ConfigError, match=r"campaign: missing; the daemon needs a \[campaign\] table"):
        load_campaign(load_profile(DEMO))


def test_trigger_level_must_lie_between_swept_levels(tmp_path: Path) -> None:
    profile = profile_with(tmp_path, "every_s = 60\nslots = 3\n[campaign.sweep]\nhigh_v = [0.3, 1.0]\n")
    fixed = tmp_path / "fixed.toml"
    fixed.write_text(profile.text.replace("averages = 1", "averages = 1\ntrigger_level_v = 0.4"))
    with pytest.raises(ConfigError, match="does not straddle acquisition.trigger_level_v = 0.4 V"):
        load_campaign(load_profile(fixed))


T0 = datetime(2026, 12, 2, 22, 0, tzinfo=UTC)


def test_interval_grid_numbers_slots_by_their_time() -> None:
    grid = IntervalGrid(T0, 600.0, slots=48, until=None)
    assert grid.time_of(1) == T0 and grid.time_of(48) == T0 + timedelta(minutes=470)
    assert grid.time_of(49) is None
    assert grid.due(T0 - timedelta(seconds=1), 0) == 0
    assert grid.due(T0, 0) == 1
    assert grid.due(T0 + timedelta(minutes=25), 1) == 3  # slots at 0, 10, 20 min have come
    assert grid.due(T0 + timedelta(days=2), 3) == 48  # never past the last slot
    assert not grid.finished(47, T0) and grid.finished(48, T0)


def test_interval_grid_until_counts_slots_up_to_and_including_until() -> None:
    grid = IntervalGrid(T0, 0.2, slots=None, until=T0 + timedelta(seconds=1))
    assert grid.total == 6  # 0, 0.2, ..., 1.0 s
    assert grid.time_of(6) == T0 + timedelta(seconds=1)


def test_cron_grid_follows_crontab_steps(tmp_path: Path) -> None:
    # crontab(5): "*/15" in the minute field means minutes 0, 15, 30 and 45 (from memory, standard cron)
    spec = load_campaign(profile_with(tmp_path, 'cron = "*/15 * * * *"\ntimezone = "UTC"\nslots = 5\n'))
    anchor = datetime(2026, 12, 2, 10, 7, tzinfo=UTC)
    grid = make_grid(spec, anchor)
    assert isinstance(grid, CronGrid)
    assert [grid.time_of(n).strftime("%H:%M") for n in range(1, 6)] == ["10:15", "10:30", "10:45", "11:00", "11:15"]
    assert grid.time_of(6) is None
    assert grid.due(datetime(2026, 12, 2, 10, 50, tzinfo=UTC), 0) == 3
    # A restart seeded with slot 3 and its time walks on from there.
    seeded = make_grid(spec, anchor, seed=(3, datetime(2026, 12, 2, 10, 45, tzinfo=UTC)))
    assert seeded.time_of(5).strftime("%H:%M") == "11:15"
    assert seeded.due(datetime(2026, 12, 2, 11, 1, tzinfo=UTC), 3) == 4


def test_cron_grid_until_counts_its_firings(tmp_path: Path) -> None:
    spec = load_campaign(profile_with(tmp_path, 'cron = "0 * * * *"\ntimezone = "UTC"\n'
                                                "start = 2026-12-02T22:30:00Z\nuntil = 2026-12-03T06:00:00Z\n"))
    grid = make_grid(spec, spec.start)
    assert grid.total == 8  # 23:00, 00:00, ..., 06:00 (until is included)


def test_back_to_back_grid() -> None:
    grid = BackToBackGrid(slots=3, until=None)
    assert grid.due(T0, 0) == 1 and grid.due(T0, 2) == 3 and grid.due(T0, 3) == 3
    assert grid.finished(3, T0) and grid.time_of(1) is None


@pytest.mark.parametrize("policy,late_s,runs,missed", [
    ("run_latest", 2.0, True, (3, 4)),
    ("run_latest", 500.0, True, (3, 4)),  # however late: the latest due slot runs once
    ("skip", 2.0, True, (3, 4)),  # within lateness_limit_s = 5 s: slot 5 still runs
    ("skip", 10.0, False, (3, 5)),  # too late: slot 5 is missed as well
])
def test_late_slot_policy_decides_and_records(tmp_path: Path, policy: str, late_s: float, runs: bool,
                                            missed: tuple[int, int]) -> None:
    from acqd.campaign.ledger import Ledger
    from acqd.campaign.runlog import RunLog, read_runlog
    from acqd.campaign.runner import CampaignRunner, StopFlag

    grace = "lateness_limit_s = 5\n" if policy == "skip" else ""
    spec = load_campaign(profile_with(tmp_path, f'every_s = 60\nslots = 10\nlate_slots = "{policy}"\n{grace}'))
    ledger, log = Ledger(tmp_path / "campaigns.sqlite"), RunLog(tmp_path / "runlog.jsonl")
    runner = CampaignRunner(spec, tmp_path, ledger, log, StopFlag())
    runner.grid = IntervalGrid(T0, 60.0, slots=10, until=None)
    # Slots 1 and 2 ran; now slot 5 is due (slots 3 and 4 passed while the daemon was down).
    assert runner._apply_late_slots(2, 5, T0 + timedelta(minutes=4, seconds=late_s)) is runs
    (row,) = ledger.slots(spec.name)
    assert (row.first_slot, row.slot, row.state) == (*missed, "missed")
    assert row.scheduled_utc == (T0 + timedelta(minutes=2)).isoformat(timespec="microseconds")  # slot 3's time
    assert row.note.startswith("run late as slot 5" if runs else "skipped: 10 s late")
    (event,) = [e for e in read_runlog(tmp_path / "runlog.jsonl") if e["event"] == "slot_missed"]
    assert (event["first_slot"], event["last_slot"], event["count"], event["policy"]) == (
        *missed, missed[1] - missed[0] + 1, policy)  # slots 3 to 5 inclusive: first and last, not a list of two
    ledger.close()
    log.close()
