"""Open the bench a profile describes: both instrument roles, starting the embedded simulated bench first
when the profile asks for it, or a replay bench serving stored records in place of the profile's bench.

On the simulated bench the scope's resource is found by asking each simulated scope for its ``*IDN?``
and keeping the one the profile's driver file matches, so that switching dialects is a one-line change of
driver in the profile, exactly as on a real bench.
"""

from __future__ import annotations

from collections.abc import Iterator, Sequence
from contextlib import ExitStack, contextmanager
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from .errors import ConfigError
from .instruments import Driver, Generator, Scope, Switch, find_driver, load_driver, open_instrument
from .profile import InstrumentPlan, Profile
from .visa import identify


@dataclass
class Bench:
    generator: Generator
    scope: Scope
    simulated: Any | None  # the running SimBench or ReplayBench, for its command log and drift clock
    switch: Switch | None = None  # the profile's [bench.switch], if it has one


@dataclass(frozen=True)
class Replay:
    """Serve these stored records as the scope instead of the profile's bench (regression runs)."""

    path: Path
    records: Sequence[int] | None = None


def _simulated_config(profile: Profile) -> Any:
    """The profile's [bench.simulated] table, validated (``sim.bench.SimBenchConfig``)."""
    from .sim.bench import SimBenchConfig  # the simulated bench is only imported when asked for

    units = len(profile.batch.units) if profile.batch is not None else None
    return SimBenchConfig.from_mapping(profile.bench.simulated or {}, profile.source, profile.text, units)


def simulated_bench(profile: Profile) -> Any:
    """A not-yet-started simulated bench built from the profile's [bench.simulated] table."""
    from .sim.bench import SimBench

    return SimBench(_simulated_config(profile))


def replay_bench(replay: Replay, profile: Profile) -> Any:
    """A not-yet-started replay bench, served over the transport the profile's [bench.simulated] names
    (the raw socket without one), so a regression run takes the client path of the run it replays."""
    from .sim.bench import Serving
    from .sim.replay import ReplayBench

    transport = _simulated_config(profile).transport if profile.bench.simulated else "socket"
    return ReplayBench(replay.path, replay.records, serving=Serving((transport,)))


def _simulated_resource(plan: InstrumentPlan, driver: Driver, identities: dict[str, str], profile: Profile) -> str:
    """The simulated instrument whose ``*IDN?`` the plan's driver file accepts."""
    for resource, identity in identities.items():
        if driver.matches(identity):
            return resource
    raise ConfigError(profile.source, f"bench.{plan.role}.driver",
                      f"driver {plan.driver!r} matches no instrument of the simulated bench")


@contextmanager
def open_bench(profile: Profile, replay: Replay | None = None) -> Iterator[Bench]:
    """Every role, opened and identified (the switch too when the profile names one); everything is closed
    (and the simulated bench stopped) on exit."""
    plans = tuple(p for p in (profile.bench.generator, profile.bench.scope, profile.bench.switch) if p is not None)
    # A bad driver name is a profile error, found before anything is started.
    drivers = [load_driver(find_driver(plan.driver, source=f"{profile.source}: bench.{plan.role}.driver"))
               for plan in plans]
    for plan, driver in zip(plans, drivers):
        if driver.role != plan.role:
            raise ConfigError(profile.source, f"bench.{plan.role}.driver",
                              f"{plan.driver!r} is a {driver.role} driver; the {plan.role} needs a {plan.role} "
                              f"driver (acqd drivers lists each file's role)")
    with ExitStack() as stack:
        sim = None
        if replay is not None or profile.bench.kind == "simulated":
            sim = replay_bench(replay, profile) if replay is not None else simulated_bench(profile)
            stack.enter_context(sim)
            plan = plans[0]  # every simulated instrument is asked once, however many roles look for one
            identities = {r: identify(r, backend=plan.backend, timeout_s=plan.timeout_s)
                          for r in sim.resources.values()}
            resources = [_simulated_resource(p, d, identities, profile) for p, d in zip(plans, drivers)]
        else:
            resources = [p.resource for p in plans]
        roles = []
        for plan, resource in zip(plans, resources):
            role = open_instrument(resource, plan.driver, backend=plan.backend, timeout_s=plan.timeout_s)
            stack.callback(role.close)
            roles.append(role)
            if plan.role == "generator":  # off before anything else is opened: a run or daemon killed
                role.output(False)        # (SIGKILL) in the middle of a step test left it on
        yield Bench(roles[0], roles[1], sim, roles[2] if len(roles) > 2 else None)
