"""Mutation testing of one core module: how many one-token bugs its own tests catch.

    python tools/mutate.py scpi            # one module (names: python tools/mutate.py --list)
    python tools/mutate.py scpi blocks     # several, one after the other
    python tools/mutate.py --all           # every core module (tens of minutes)
    python tools/mutate.py store --only 'acqd.store.reader.*'   # only the mutants whose names match

The tool is mutmut (installed by the ``mutation`` extra: ``pip install -e '.[mutation]'``). Each run works
in a scratch copy of the package and the tests, so the working tree is never edited and two runs do not
disturb each other. mutmut copies that tree again into ``mutants/``, rewrites the chosen module so that
every mutant is a separate function behind a switch, runs the chosen tests once to learn which test
reaches which function, and then runs, per mutant, only the tests that reach it (one forked process per
mutant, so a module of a few hundred mutants takes about a minute).

It prints, per module: mutants, killed (a test failed, or the run timed out), survived, not reached by
any chosen test, the score = killed / (all − equivalent), and each survivor that is not listed as
equivalent with its diff. Equivalent mutants (ones no test can tell from the original because the
behaviour is the same) and mutants that change only the wording of a checked error message are listed in
``tools/mutation-equivalents.toml`` with the reason; they are matched by module, function and the
mutated line, so a listing outlives renumbering but not an edit of that line. The raw score (killed /
all) is printed beside the score without them.

The mutation run is not part of the test command (``pytest -q``); it is a tool for whoever changes the
core or its tests.
"""

from __future__ import annotations

import argparse
import fnmatch
import json
import os
import re
import shutil
import subprocess
import sys
import tempfile
import time
import tomllib
from dataclasses import dataclass
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
EQUIVALENTS = ROOT / "tools" / "mutation-equivalents.toml"
COPIED = ("acqd", "tests", "drivers", "profiles", "pyproject.toml")

# module key → (files to mutate, tests that exercise them, pytest options allowed). The tests are the ones written
# against the
# module's behaviour; the slow end-to-end files (the daemon, the README, the CLI) are left out so that a
# module takes minutes, not hours.
MODULES: dict[str, tuple[tuple[str, ...], tuple[str, ...]]] = {
    "scpi": (("acqd/scpi.py",), ("tests/test_scpi.py", "tests/test_sim_parser.py", "tests/test_fuzz.py")),
    "blocks": (("acqd/visa/blocks.py",), ("tests/test_blocks.py", "tests/test_transport.py")),
    "store": (
        ("acqd/store/segment.py", "acqd/store/writer.py", "acqd/store/reader.py", "acqd/store/recovery.py"),
        ("tests/test_store.py", "tests/test_store_rules.py", "tests/test_store_recovery.py",
         "tests/test_store_format.py"),
    ),
    # the two 100-fit coverage tests of whole records take minutes per surviving mutant; the 1000-trial
    # binomial coverage test of a small model stays in
    "fit": (("acqd/compare/fit.py",), ("tests/test_compare_fit.py", "tests/test_fit_rank.py", "-k",
                                       "not 90_of_100 and not band_limited")),
    "ieee181": (("acqd/compare/ieee181.py",), ("tests/test_compare_ieee181.py", "tests/test_compare_levels.py",
                                               "tests/test_ieee181_rules.py")),
    "metrics": (("acqd/compare/metrics.py",), ("tests/test_compare_fit.py", "tests/test_compare_ieee181.py",
                                               "tests/test_metrics.py")),
    "verdict": (("acqd/compare/verdict.py",), ("tests/test_compare_core.py", "tests/test_verdict.py")),
    "statespace": (("acqd/models/statespace.py",), ("tests/test_models.py", "tests/test_statespace.py")),
    "ledger": (("acqd/campaign/ledger.py",), ("tests/test_campaign_spec.py", "tests/test_ledger.py")),
}

STATUSES = ("killed", "timeout", "survived", "no tests", "suspicious", "skipped")


@dataclass(frozen=True)
class Equivalent:
    """A mutant that behaves exactly as the original: the reason says why no test can kill it."""

    module: str
    function: str
    line: str
    kind: str
    reason: str


@dataclass
class Outcome:
    """One module's run: every mutant's status, the survivors' diffs, and the wall time."""

    key: str
    status: dict[str, str]
    diffs: dict[str, str]
    seconds: float


def load_equivalents() -> list[Equivalent]:
    """The listed mutants (``[[equivalent]]`` tables: module, function, line, kind, reason)."""
    if not EQUIVALENTS.exists():
        return []
    tables = tomllib.loads(EQUIVALENTS.read_text(encoding="utf-8")).get("equivalent", [])
    return [Equivalent(t["module"], t["function"], t["line"].strip(), t["kind"], t["reason"]) for t in tables]


def mutant_function(name: str) -> str:
    """``acqd.scpi.x_decode_block__mutmut_3`` → ``decode_block`` (methods: ``Class.method``)."""
    tail = name.rsplit(".", 1)[-1]
    tail = re.sub(r"__mutmut_\d+$", "", tail)
    if "ǁ" in tail:  # mutmut's spelling of a method: xǁClassǁmethod
        _, cls, method = tail.split("ǁ")
        return f"{cls}.{method}"
    return tail[2:] if tail.startswith("x_") else tail


def mutated_line(diff: str) -> str:
    """The first added line of a mutant's diff, stripped: what the mutant reads where the original did."""
    for line in diff.splitlines():
        if line.startswith("+") and not line.startswith("+++"):
            return line[1:].strip()
    return ""


def is_equivalent(key: str, name: str, diff: str, equivalents: list[Equivalent]) -> Equivalent | None:
    """The listing that covers this mutant, if any."""
    function, line = mutant_function(name), mutated_line(diff)
    for eq in equivalents:
        if eq.module == key and eq.function == function and eq.line == line:
            return eq
    return None


def present(tests: tuple[str, ...]) -> tuple[str, ...]:
    """The test selection without files this checkout does not have (an older commit, measured "before")."""
    return tuple(t for t in tests if not t.startswith("tests/") or (ROOT / t.split("::")[0]).exists())


def prepare(work: Path, key: str) -> None:
    """A scratch copy of the package and tests with mutmut's configuration for one module."""
    for item in COPIED:
        source = ROOT / item
        if source.is_dir():
            shutil.copytree(source, work / item, symlinks=True,
                            ignore=shutil.ignore_patterns("__pycache__", "*.egg-info"))
        else:
            shutil.copy2(source, work / item)
    paths, tests = MODULES[key]
    tests = present(tests)
    lines = ["[mutmut]", "source_paths=" + "\n    ".join(paths),
             "pytest_add_cli_args_test_selection=" + "\n    ".join(tests),
             # one argument a line (mutmut takes a one-line value as a single argument); -n 0 undoes the
             # project's two xdist workers, since mutmut must see in its own process which tests reach a mutant
             "pytest_add_cli_args=" + "\n    ".join(("-p", "no:cacheprovider", "-n", "0")),
             "also_copy=" + "\n    ".join(item for item in COPIED if item not in ("tests", "pyproject.toml"))]
    (work / "setup.cfg").write_text("\n".join(lines) + "\n", encoding="utf-8")


def mutmut(work: Path, *args: str, log: Path | None = None) -> str:
    """Run mutmut in the scratch copy; its progress goes to the log, the text it prints is returned."""
    exe = Path(sys.executable).with_name("mutmut")
    env = dict(os.environ, PYTHONDONTWRITEBYTECODE="1")
    if log is None:
        done = subprocess.run([str(exe), *args], cwd=work, env=env, capture_output=True, text=True, check=False)
        return done.stdout
    with log.open("w", encoding="utf-8") as out:
        done = subprocess.run([str(exe), *args], cwd=work, env=env, stdout=out, stderr=subprocess.STDOUT,
                              check=False)
    if done.returncode != 0:
        tail = log.read_text(encoding="utf-8", errors="replace")[-3000:]
        raise SystemExit(f"mutmut run failed for {work} (exit {done.returncode}); end of {log}:\n{tail}")
    return ""


# One process for every diff: ``mutmut show NAME`` would start mutmut once per survivor.
_DIFFS = """
import json, sys
from mutmut.__main__ import find_mutant, get_diff_for_mutant
names = json.load(sys.stdin)
print(json.dumps({name: get_diff_for_mutant(name, path=find_mutant(name).path) for name in names}))
"""


def survivor_diffs(work: Path, names: list[str]) -> dict[str, str]:
    """name → unified diff of each mutant, from mutmut's own diff function, in one child process."""
    done = subprocess.run([sys.executable, "-c", _DIFFS], cwd=work, input=json.dumps(names), capture_output=True,
                          text=True, check=True)
    return json.loads(done.stdout)


def run_module(key: str, keep: Path | None, only: tuple[str, ...] = ()) -> Outcome:
    """Mutate one module in a scratch copy and collect every mutant's status and the survivors' diffs.

    ``only`` (mutmut's own name patterns, ``fnmatch`` style) runs a part of a module: a function being worked
    on takes a minute where the whole store takes most of an hour. Its score is the part's alone."""
    work = Path(tempfile.mkdtemp(prefix=f"acqd-mutate-{key}-", dir=keep))
    start = time.monotonic()
    try:
        prepare(work, key)
        mutmut(work, "run", *only, log=work / "mutmut-run.log")
        seconds = time.monotonic() - start
        status = {}
        for line in mutmut(work, "results", "--all", "true").splitlines():
            name, _, state = line.strip().rpartition(": ")
            if name and (not only or any(fnmatch.fnmatch(name, pattern) for pattern in only)):
                status[name] = state
        diffs = survivor_diffs(work, [name for name, state in status.items() if state in ("survived", "no tests")])
        return Outcome(key, status, diffs, seconds)
    finally:
        if keep is None:
            shutil.rmtree(work, ignore_errors=True)


def report(outcome: Outcome, equivalents: list[Equivalent]) -> dict:
    """Print one module's score and its surviving mutants; return the figures for --json."""
    counts = {state: 0 for state in STATUSES}
    for state in outcome.status.values():
        counts[state] = counts.get(state, 0) + 1
    listed = {name: eq for name, diff in outcome.diffs.items()
              if (eq := is_equivalent(outcome.key, name, diff, equivalents))}
    killed = counts["killed"] + counts["timeout"]
    total = len(outcome.status) - counts["skipped"]
    scored = total - len(listed)
    score = 100.0 * killed / scored if scored else 100.0
    raw = 100.0 * killed / total if total else 100.0
    wording = sum(1 for eq in listed.values() if eq.kind == "wording")
    paths, tests = MODULES[outcome.key][0], present(MODULES[outcome.key][1])
    print(f"== {outcome.key}: {', '.join(paths)}  (tests: {', '.join(tests)}; {outcome.seconds:.0f} s)")
    print(f"   mutants {total}, killed {killed} (timeouts {counts['timeout']}), survived {counts['survived']}, "
          f"not reached {counts['no tests']}, listed {len(listed)} ({len(listed) - wording} equivalent, "
          f"{wording} message wording)")
    print(f"   mutation score {score:.1f} %  (killed / (mutants - listed)); raw {raw:.1f} % (killed / mutants)")
    open_survivors = [name for name in outcome.diffs if name not in listed]
    for name in open_survivors:
        print(f"\n-- {name}: {outcome.status[name]}")
        print("\n".join(line for line in outcome.diffs[name].splitlines() if line.strip()))
    return {"module": outcome.key, "mutants": total, "killed": killed, "survived": counts["survived"],
            "not_reached": counts["no tests"], "listed": len(listed), "score_pct": round(score, 1),
            "raw_score_pct": round(raw, 1),
            "open_survivors": open_survivors}


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n", 1)[0])
    parser.add_argument("modules", nargs="*", help=f"modules to mutate: {', '.join(MODULES)}")
    parser.add_argument("--all", action="store_true", help="every core module")
    parser.add_argument("--list", action="store_true", help="list the modules, their files and tests")
    parser.add_argument("--keep", type=Path, help="keep the scratch copies under this folder")
    parser.add_argument("--json", type=Path, help="also write the figures to this JSON file")
    parser.add_argument("--only", action="append", default=[], metavar="PATTERN",
                        help="run only the mutants whose names match (e.g. 'acqd.store.reader.x__open*'); repeatable")
    args = parser.parse_args(argv)
    if args.list:
        for key, (paths, tests) in MODULES.items():
            print(f"{key:11s} {' '.join(paths)}\n{'':11s} tests: {' '.join(tests)}")
        return 0
    keys = list(MODULES) if args.all else args.modules
    unknown = [key for key in keys if key not in MODULES]
    if not keys or unknown:
        parser.error(f"name one or more modules of: {', '.join(MODULES)}" + (f" (not {unknown})" if unknown else ""))
    if shutil.which("mutmut", path=str(Path(sys.executable).parent)) is None:
        raise SystemExit("mutmut is not installed in this environment: pip install -e '.[mutation]'")
    if args.keep:
        args.keep.mkdir(parents=True, exist_ok=True)
    equivalents = load_equivalents()
    figures = [report(run_module(key, args.keep, tuple(args.only)), equivalents) for key in keys]
    if args.json:
        args.json.write_text(json.dumps(figures, indent=2) + "\n", encoding="utf-8")
    return 0


if __name__ == "__main__":
    sys.exit(main())
