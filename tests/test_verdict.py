"""The verdict's rules, checked on hand-made inputs: which limits are inclusive, what a missing value does,
how a parameter's deviation is measured, and what each check and sentence carries.

The rules are the ones the tolerance keys state: ``nrmse_max`` and ``settling_s_max`` are ceilings a value
may equal ("≤", as the limit text says), ``overshoot_pct = [lo, hi]`` is a closed interval, and
``parameter_pct`` bounds the relative deviation 100·|fitted − nominal| / |nominal| (the textbook relative
error). The sentences follow the form acqd/compare/verdict.py documents (``R: fitted 27.31 Ω is 24.1 % from
nominal 22 Ω``); every number in them below is written out by hand from the inputs (4 significant figures
for a reading, 3 for NRMSE in percent, a limit as it was set, without trailing zeros), not copied from a run.
"""

from __future__ import annotations

import math

import pytest

from acqd.compare.fit import FitResult
from acqd.compare.ieee181 import StepParameters
from acqd.compare.metrics import ChannelResult
from acqd.compare.spec import ChannelLimits, Tolerances
from acqd.compare.verdict import judge


def step(overshoot_pct: float = 12.0, settling_s: float | None = 347.4e-6) -> StepParameters:
    return StepParameters("rising", 0.0, 1.0, "histogram", 1.0, 1e-6, 2e-6, 3e-6, 2e-6, overshoot_pct, 0.4,
                          0.0, 2.0, settling_s, 5e-6, 1.12, None, "fewer than three lobes", 1, 0.0)


def channel(nrmse: float = 0.0525, measured: StepParameters | None = None, note: str = "") -> ChannelResult:
    return ChannelResult("v_c", "v_c", "V", 1.0, 0.0, 0.01, nrmse, 0.02, 1e-4, 0.001, 0.0, measured,
                         step(), note)


def fitted(values: dict[str, float], nominal: dict[str, float], *, nuisance: tuple[str, ...] = (),
           held_fixed: dict[str, str] | None = None) -> FitResult:
    names = tuple(values)
    return FitResult(names, held_fixed or {}, nominal, {"r_ohm": "ohm", "l_h": "H", "t0_s": "s"}, nuisance, values,
                     {n: 0.0 for n in names}, {n: (v, v) for n, v in values.items()}, {}, [1.0], 1.0, len(names),
                     "noise", 1.0, (0,), 10, True, "")


def only(checks, kind):
    (found,) = [c for c in checks if c.check == kind]
    return found


@pytest.mark.parametrize("nrmse, passed", [(0.05, True), (0.0525, False), (0.0499, True)])
def test_nrmse_ceiling_is_inclusive_and_kept_as_a_fraction(nrmse, passed):
    verdict, notes = judge([channel(nrmse)], None, Tolerances(nrmse_max=0.05))
    check = only(verdict.checks, "nrmse")
    assert (check.subject, check.value, check.limit, check.passed) == ("v_c", nrmse, "≤ 5 %", passed)
    shown = {0.05: "5.00 %", 0.0525: "5.25 %", 0.0499: "4.99 %"}[nrmse]  # 100·nrmse, 3 significant figures
    assert check.reason == f"v_c: NRMSE {shown} ({'meets' if passed else 'breaks'} ≤ 5 %)"
    assert verdict.status == ("pass" if passed else "fail") and verdict.passed is passed and notes == []
    assert verdict.reasons == ([] if passed else [check.reason])


def test_an_infinite_nrmse_fails():
    # A simulated trace with no range gives NRMSE = inf (metrics' definition); it can meet no ceiling.
    verdict, _ = judge([channel(math.inf)], None, Tolerances(nrmse_max=0.05))
    assert verdict.status == "fail" and not only(verdict.checks, "nrmse").passed


@pytest.mark.parametrize("overshoot, passed", [(10.0, True), (20.0, True), (9.99, False), (20.01, False), (15.0, True)])
def test_overshoot_band_is_closed_at_both_ends(overshoot, passed):
    limits = Tolerances(channels={"v_c": ChannelLimits(overshoot_pct=(10.0, 20.0))})
    verdict, _ = judge([channel(measured=step(overshoot))], None, limits)
    check = only(verdict.checks, "overshoot")
    assert (check.value, check.limit, check.passed) == (overshoot, "10 % … 20 %", passed)
    shown = {10.0: "10.00 %", 20.0: "20.00 %", 9.99: "9.990 %", 20.01: "20.01 %", 15.0: "15.00 %"}[overshoot]
    assert check.reason == f"v_c: overshoot {shown} ({'meets' if passed else 'breaks'} 10 % … 20 %)"


@pytest.mark.parametrize("settling_s, passed", [(347.4e-6, False), (300e-6, True), (299.9e-6, True)])
def test_settling_ceiling_is_inclusive_and_kept_in_seconds(settling_s, passed):
    limits = Tolerances(channels={"v_c": ChannelLimits(settling_s_max=300e-6)})
    verdict, _ = judge([channel(measured=step(settling_s=settling_s))], None, limits)
    check = only(verdict.checks, "settling")
    assert (check.value, check.limit, check.passed) == (settling_s, "≤ 300 µs", passed)
    shown = {347.4e-6: "347.4 µs", 300e-6: "300.0 µs", 299.9e-6: "299.9 µs"}[settling_s]
    assert check.reason == f"v_c: settling time {shown} ({'meets' if passed else 'breaks'} ≤ 300 µs)"


def test_a_trace_that_never_settles_fails_and_says_within_which_band():
    limits = Tolerances(settling_band_pct=5.0, channels={"v_c": ChannelLimits(settling_s_max=300e-6)})
    verdict, _ = judge([channel(measured=step(settling_s=None))], None, limits)
    check = only(verdict.checks, "settling")
    why = " (never stays inside ±5 % within the record)"
    assert (check.subject, check.value, check.passed, check.limit) == ("v_c", None, False, "≤ 300 µs" + why)
    assert check.reason == f"v_c: settling time is undefined{why}; ≤ 300 µs required"
    assert verdict.status == "fail" and verdict.reasons == [check.reason]


def test_without_step_parameters_every_step_check_fails_with_the_reason():
    limits = Tolerances(nrmse_max=0.1, channels={"v_c": ChannelLimits(overshoot_pct=(0.0, 5.0), settling_s_max=1e-3)})
    verdict, _ = judge([channel(0.02, measured=None, note="measured trace: no edge")], None, limits)
    why = " (measured trace: no edge)"
    overshoot, settling = only(verdict.checks, "overshoot"), only(verdict.checks, "settling")
    assert (overshoot.value, overshoot.passed, overshoot.limit) == (None, False, "0 % … 5 %" + why)
    assert overshoot.reason == f"v_c: overshoot is undefined{why}; 0 % … 5 % required"
    assert (settling.value, settling.passed, settling.limit) == (None, False, "≤ 1 ms" + why)
    assert settling.reason == f"v_c: settling time is undefined{why}; ≤ 1 ms required"
    assert only(verdict.checks, "nrmse").passed  # a missing edge does not touch the NRMSE check
    assert verdict.reasons == [overshoot.reason, settling.reason]  # failures in the order of the checks


def test_no_tolerance_leaves_the_record_untested_not_failed():
    verdict, notes = judge([channel(0.9, measured=None)], None, Tolerances())
    assert (verdict.status, verdict.checks, verdict.reasons, verdict.passed, notes) == ("untested", [], [], True, [])


@pytest.mark.parametrize("value, passed", [(21.0, True), (19.0, True), (21.01, False), (18.99, False)])
def test_parameter_deviation_is_relative_to_the_nominal_value_and_inclusive(value, passed):
    # 100·|value − 20| / 20 against ±5 %: 1 Ω either side is exactly 5 % (inclusive; exact in binary
    # floating point), 1.01 Ω is 5.05 %.
    verdict, notes = judge([], fitted({"r_ohm": value}, {"r_ohm": 20.0}), Tolerances(parameter_pct={"r_ohm": 5.0}))
    check = only(verdict.checks, "parameter")
    off = 100 * abs(value - 20.0) / 20.0
    assert (check.subject, check.value, check.limit, check.passed) == ("r_ohm", value, "nominal 20 Ω ±5 %", passed)
    assert check.reason == (f"R: fitted {value:.2f} Ω is {off:.1f} % from nominal 20 Ω "
                            f"({'within' if passed else 'outside'} ±5 %)")
    assert notes == [] and verdict.status == ("pass" if passed else "fail")


def test_parameter_limits_by_name_override_the_default_and_skip_the_edge_instant():
    # The edge instant t0 comes first: skipping it must not end the loop over what was fitted.
    fit = fitted({"t0_s": 1e-6, "r_ohm": 27.31, "l_h": 3.36e-3}, {"t0_s": 0.0, "r_ohm": 22.0, "l_h": 3.0e-3},
                 nuisance=("t0_s",))
    # R is 24.1 % off (fails "*": ±10 %); L is 12 % off, so it passes only by its own ±15 %; t0 is no
    # parameter (a nominal 0, which a check would have to refuse).
    verdict, notes = judge([], fit, Tolerances(parameter_pct={"*": 10.0, "l_h": 15.0}))
    by_name = {c.subject: c for c in verdict.checks}
    assert sorted(by_name) == ["l_h", "r_ohm"] and notes == []
    assert by_name["r_ohm"].reason == "R: fitted 27.31 Ω is 24.1 % from nominal 22 Ω (outside ±10 %)"
    assert by_name["l_h"].passed and by_name["l_h"].limit == "nominal 3 mH ±15 %"
    assert verdict.status == "fail" and verdict.reasons == [by_name["r_ohm"].reason]


def test_parameter_tolerances_that_cannot_be_applied_are_notes_not_checks():
    # R's nominal 0 has no relative deviation; the loop goes on to C, which is checked.
    fit = fitted({"r_ohm": 1.0, "c_f": 100e-9}, {"r_ohm": 0.0, "c_f": 100e-9}, held_fixed={"l_h": "no sensitivity"})
    verdict, notes = judge([], fit, Tolerances(parameter_pct={"r_ohm": 5.0, "l_h": 5.0, "c_f": 5.0, "gain": 5.0}))
    assert verdict.status == "pass" and [c.subject for c in verdict.checks] == ["c_f"]
    assert notes == ["tolerances.parameter_pct not checked for r_ohm: its nominal value is 0",
                     "tolerances.parameter_pct.l_h not checked: l_h was not fitted (no sensitivity)",
                     "tolerances.parameter_pct.gain not checked: gain was not fitted"]
    _, without_fit = judge([], None, Tolerances(parameter_pct={"*": 5.0}))
    assert without_fit == ["tolerances.parameter_pct is set but nothing was fitted; it was not checked"]
    assert judge([], None, Tolerances())[1] == []  # no parameter tolerance: nothing to say


def test_a_unitless_parameter_and_a_nominal_value_as_it_was_set():
    # ζ has no unit; a nominal value is shown as set, to six significant figures (our convention: a part of
    # 1.234567 kΩ reads 1.23457 kΩ, not a four-figure reading), trailing zeros dropped.
    fit = fitted({"zeta": 0.3, "r_ohm": 1234.567}, {"zeta": 0.25, "r_ohm": 1234.567})
    verdict, _ = judge([], fit, Tolerances(parameter_pct={"*": 30.0}))
    zeta, r = verdict.checks
    assert zeta.reason == "ζ: fitted 0.3000 is 20.0 % from nominal 0.25 (within ±30 %)"
    assert zeta.limit == "nominal 0.25 ±30 %" and r.limit == "nominal 1.23457 kΩ ±30 %"


def test_a_parameter_without_a_limit_is_not_checked():
    verdict, notes = judge([], fitted({"r_ohm": 30.0, "l_h": 3e-3}, {"r_ohm": 22.0, "l_h": 3e-3}),
                           Tolerances(parameter_pct={"l_h": 1.0}))
    assert [c.subject for c in verdict.checks] == ["l_h"] and notes == [] and verdict.status == "pass"
