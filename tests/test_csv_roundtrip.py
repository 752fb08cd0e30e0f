"""An exported record comes back: ``acqd export`` then ``acqd compare OUT.csv`` gives the stored record's
result, with the stimulus and the [dut] table taken from the JSON written beside the CSV (issue 9, item 12).

The reference is the stored record itself, compared by the same command; the CSV is also read by Python's
``csv`` module and ``numpy.loadtxt`` (independent readers of RFC 4180 text).
"""

from __future__ import annotations

import csv
import json
from pathlib import Path

import numpy as np
import pytest

from acqd.cli import main
from acqd.store import open_records
from test_run import profile_file


@pytest.fixture(scope="module")
def exported(tmp_path_factory: pytest.TempPathFactory) -> tuple[Path, Path]:
    """Two records of the demo profile on the simulated bench, and record 1 exported as CSV."""
    tmp = tmp_path_factory.mktemp("roundtrip")
    assert main(["run", str(profile_file(tmp)), "--count", "2"]) == 0
    store, out = tmp / "records.h5", tmp / "rec1.csv"
    assert main(["export", str(store), "--record", "1", "--out", str(out)]) == 0
    return store, out


def compare_json(capsys: pytest.CaptureFixture, *argv: str) -> tuple[int, dict]:
    capsys.readouterr()
    code = main(["compare", *argv, "--json"])
    captured = capsys.readouterr()
    assert captured.err == "", captured.err
    return code, json.loads(captured.out)


def leaves(node: object, path: str = "") -> dict[str, object]:
    """Every leaf of a JSON tree by its path, so two results can be compared value by value."""
    if isinstance(node, dict):
        return {k: v for key, child in node.items() for k, v in leaves(child, f"{path}.{key}").items()}
    if isinstance(node, list):
        return {k: v for i, child in enumerate(node) for k, v in leaves(child, f"{path}[{i}]").items()}
    return {path: node}


def test_header_names_units_in_brackets_and_numbers_are_exact(exported: tuple[Path, Path]) -> None:
    store, out = exported
    with open(out, newline="", encoding="utf-8") as fh:
        header = next(csv.reader(fh))
    assert header == ["t [s]", "v_src [V]", "v_rl [V]", "v_c [V]", "i_l [A]"]
    table = np.loadtxt(out, delimiter=",", skiprows=1)
    with open_records(store) as reader:
        record = reader.read(1)
    np.testing.assert_array_equal(table[:, 0], record.timebase.times())  # repr round-trips float64 exactly
    for k, channel in enumerate(record.channels, start=1):
        np.testing.assert_array_equal(table[:, k], channel.samples)


def test_compare_on_the_export_equals_compare_on_the_store(exported: tuple[Path, Path],
                                                           capsys: pytest.CaptureFixture) -> None:
    store, out = exported
    code_store, from_store = compare_json(capsys, str(store), "--record", "1")
    code_csv, from_csv = compare_json(capsys, str(out))  # no stimulus options, no profile: all from the JSON
    assert code_csv == code_store == 0
    assert from_csv["verdict"] == from_store["verdict"] == "pass"
    assert from_csv["model"] == from_store["model"]
    assert from_csv["record"]["dut"] == from_store["record"]["dut"]
    for name, value in from_store["parameters"].items():
        assert from_csv["parameters"][name] == pytest.approx(value, rel=1e-9), name
    stored_values, csv_values = leaves(from_store["channels"]), leaves(from_csv["channels"])
    assert csv_values.keys() == stored_values.keys()
    for path, value in stored_values.items():  # every metric and step parameter of every channel
        if isinstance(value, float):
            assert csv_values[path] == pytest.approx(value, rel=1e-7, abs=1e-12, nan_ok=True), path
        else:
            assert csv_values[path] == value, path
    for key in ("before_v", "after_v", "t50_s", "duration_s"):
        assert from_csv["stimulus"][key] == pytest.approx(from_store["stimulus"][key], rel=1e-12, abs=1e-15)


def test_timing_says_where_it_came_from(exported: tuple[Path, Path], capsys: pytest.CaptureFixture,
                                        tmp_path: Path) -> None:
    _, out = exported
    # Another model than the record's [dut] starts a fresh table: no channel places the edge, so the
    # timing is the record's own.
    model = ["--model", "rc_lowpass", "--param", "r_ohm=22", "--param", "c_f=100e-9", "--map", "v_c=v_c"]
    _, from_csv = compare_json(capsys, str(out), *model)
    assert from_csv["stimulus"]["timing"] == "from rec1.csv.json (t50 at the trigger)"
    bare = tmp_path / "bare.csv"
    bare.write_bytes(out.read_bytes())  # the same samples without the JSON: a foreign CSV
    _, foreign = compare_json(capsys, str(bare), "--high", "1", *model)
    assert "metadata" not in foreign["stimulus"]["timing"]
    assert foreign["stimulus"]["timing"] == "t = 0 of bare.csv's time column taken as the edge (t50)"


def test_stimulus_options_beside_a_json_are_refused(exported: tuple[Path, Path], capsys: pytest.CaptureFixture) -> None:
    _, out = exported
    assert main(["compare", str(out), "--high", "2"]) == 2
    err = capsys.readouterr().err
    assert err.startswith("acqd: error: ") and "--high" in err and "rec1.csv.json gives the stimulus" in err


@pytest.mark.parametrize("edit, field, problem", [
    (lambda m: m.update(channels=m["channels"][:2]), "channels", "the JSON is not this CSV's"),
    (lambda m: m["stimulus"].update(high_v="one volt"), "stimulus.high_v", "must be a finite number"),
    (lambda m: m["stimulus"].update(edge="up"), "stimulus.edge", "must be one of rising, falling"),
    (lambda m: m["timebase"].update(pretrigger_samples=3), "timebase", "samples before the trigger"),
    (lambda m: m["channels"][2].update(unit="mV"), "channels.v_c.unit", "the CSV header says 'V'"),
])
def test_a_json_that_does_not_fit_is_one_line(exported: tuple[Path, Path], capsys: pytest.CaptureFixture,
                                              tmp_path: Path, edit, field: str, problem: str) -> None:
    _, out = exported
    copy = tmp_path / "edited.csv"
    copy.write_bytes(out.read_bytes())
    meta = json.loads(Path(f"{out}.json").read_text())
    edit(meta)
    Path(f"{copy}.json").write_text(json.dumps(meta))
    capsys.readouterr()
    assert main(["compare", str(copy)]) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and "Traceback" not in err
    assert f"edited.csv.json: {field}:" in err and problem in err, err
