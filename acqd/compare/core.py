"""Compare one record with a model: simulate with the record's stimulus, measure, fit, judge.

The flow: the nominal model (with the generator's source resistance from the record unless the table
gives one) is driven by the stimulus edge from rest; each mapped channel is predicted as
gain × signal + offset; free parameters are identified when asked; then every channel gets its errors and
IEEE 181 step parameters, and the tolerances give the verdict. The result is plain data (``to_dict``,
``to_json``) plus the traces for figures, which are not serialised.
"""

from __future__ import annotations

import json
import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field, fields, is_dataclass, replace
from functools import cached_property
from typing import Any

import numpy as np

from ..errors import ConfigError
from ..models import StateSpace, with_sensitivities
from ..record import TIMING_SETTING, Record
from .fit import FitResult, Free, fit_parameters
from .ieee181 import code_step_of
from .memo import Memo
from .metrics import (BASELINE_WARN_SHARE, NRMSE_BASIS, ChannelResult, channel_result, noise_rms, quantisation_rms,
                      record_code_step)
from .spec import DEFAULT_HOLD, ChannelMap, CompareSpec, Signal, spec_from_parts
from .stimulus import Edge, align_edge, edge_states, steady_state
from .verdict import Verdict, judge

STEP_MIN_SHARE = 1e-3  # a signal whose rest value moves less than this share of its range has no step
ALIGN_SEARCH_SAMPLES = 10
EDGE_PARAMETER = "edge_t50_s"  # the edge instant, fitted with the parameters when a stimulus channel is mapped
WEIGHT_FLOOR_SHARE = 1e-6  # a channel's weight never drops below this share of its range (noise-free data)
MATRIX_STEP_SHARE = 1e-6  # relative step of the builder's central differences for ∂A, ∂B, ∂C, ∂D


@dataclass
class Traces:
    """Arrays for figures: on the record's time axis, one entry per mapped channel or model state."""

    times: np.ndarray
    emf: np.ndarray
    measured: dict[str, np.ndarray]
    simulated: dict[str, np.ndarray]
    units: dict[str, str]
    states: tuple[str, ...]
    state_units: tuple[str, ...]
    states_simulated: np.ndarray  # (n_samples, n_states)
    states_measured: dict[str, np.ndarray]  # only states the mapped channels determine


@dataclass
class CompareResult:
    """One record against one model: per-channel results, the fit, the verdict, and warnings."""

    record: dict[str, Any]
    model: str
    nominal: dict[str, Any]
    parameters: dict[str, Any]  # the values the final simulation used (nominal, or fitted where fitted)
    stimulus: dict[str, Any]
    channels: list[ChannelResult]
    fit: FitResult | None
    verdict: Verdict
    warnings: list[str]
    nrmse_normalised_by: str = NRMSE_BASIS
    traces: Traces | None = field(default=None, repr=False)

    def channel(self, name: str) -> ChannelResult:
        for ch in self.channels:
            if ch.channel == name:
                return ch
        raise KeyError(f"no compared channel {name!r}; compared: {[c.channel for c in self.channels]}")

    def to_dict(self) -> dict[str, Any]:
        """JSON-able: numbers as floats, NaN and infinity as null, the traces left out.

        The verdict is flattened to the top level (``verdict``: "pass" | "fail" | "untested", ``passed``,
        ``checks``, ``reasons``): the store indexes ``verdict`` as text when a result is kept as a record's
        ``analysis``.
        """
        out = _plain(self)
        verdict = out.pop("verdict")
        return {**out, "verdict": verdict["status"], "passed": self.verdict.passed,
                "checks": verdict["checks"], "reasons": verdict["reasons"]}

    def to_json(self, **kwargs: Any) -> str:
        return json.dumps(self.to_dict(), allow_nan=False, **kwargs)


def _plain(value: Any) -> Any:
    """JSON-able copy; the common leaf types are tested first (a result holds about a hundred of them)."""
    if value is None or isinstance(value, str):
        return value
    if isinstance(value, (bool, np.bool_)):  # before int: a bool is an int
        return bool(value)
    if isinstance(value, (int, np.integer)):
        return int(value)
    if isinstance(value, (float, np.floating)):
        return float(value) if math.isfinite(value) else None
    if isinstance(value, (list, tuple, np.ndarray)):
        return [_plain(v) for v in value]
    if is_dataclass(value) and not isinstance(value, type):
        return {f.name: _plain(getattr(value, f.name)) for f in fields(value) if f.name != "traces"}
    if isinstance(value, Mapping):
        return {str(k): _plain(v) for k, v in value.items()}
    return value


@dataclass(frozen=True)
class _Setup:
    """What stays fixed while parameters change: the record's data, the mapping, the edge."""

    spec: CompareSpec
    times: np.ndarray
    mapping: tuple[ChannelMap, ...]
    measured: np.ndarray  # (n_channels, n_samples)
    units: tuple[str, ...]  # the record's unit of each mapped channel
    nominal: dict[str, Any]
    edge: Edge

    def model(self, values: Mapping[str, float] | None = None) -> StateSpace:
        return self.spec.build({**self.nominal, **(values or {})})

    @cached_property
    def sample_code_steps(self) -> tuple[float, ...]:
        """Each measured channel's code step as its samples show it (``ieee181.code_step_of``): read once,
        for the fit's weights and the step parameters alike (a sort of every sample each time)."""
        return tuple(code_step_of(y) for y in self.measured)

    def rows(self, model: StateSpace) -> tuple[np.ndarray, np.ndarray]:
        """(P, Q) so that the predicted channels are x·Pᵀ + u·Q (gains applied, offsets not)."""
        rows = [m.signal.row(model) for m in self.mapping]
        gains = np.array([m.gain for m in self.mapping])
        return np.array([r[0] for r in rows]) * gains[:, None], np.array([r[1] for r in rows]) * gains

    def predict(self, model: StateSpace, edge: Edge) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """(states, predicted channels (n_channels, n_samples), EMF)."""
        x, u = edge_states(model, self.times, edge)
        return x, self._channels(model, x, u), u

    def _channels(self, model: StateSpace, x: np.ndarray, u: np.ndarray) -> np.ndarray:
        """The predicted channels (n_channels, n_samples) from the states and the EMF."""
        p, q = self.rows(model)
        predicted = p @ x.T  # built in the (channel, sample) layout: numpy broadcasts fastest along samples
        predicted += q[:, None] * u
        predicted += np.array([m.offset for m in self.mapping])[:, None]
        return predicted

    def sensitivities(self, values: Mapping[str, float], edge: Edge, edge_parameter: str,
                      channel_scale: np.ndarray) -> np.ndarray:
        """∂(predicted channel × ``channel_scale``)/∂value (``response_and_sensitivities``, without the
        response)."""
        return self.response_and_sensitivities(values, edge, edge_parameter, channel_scale)[1]

    def response_and_sensitivities(self, values: Mapping[str, float], edge: Edge, edge_parameter: str,
                                   channel_scale: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """(the predicted channels at ``values``, as ``predict`` gives them; ∂(predicted channel ×
        ``channel_scale``)/∂value for each of ``values`` in its order (model parameters, and
        ``edge_parameter`` if present, the edge's t50 instant): one column each, the channels one after the
        other down the rows, as the fit's residual vector has them). The response is the first block of
        the same propagation, so a fit step that needs both pays for one.

        The state's derivatives come from one propagation of ``with_sensitivities`` (Van Loan's block
        exponential); they need ∂A, ∂B (and ∂C, ∂D for the channel rows) by each parameter, which come
        from central differences of the model builder at a relative step of 1e-6: a builder's matrices
        are rational in the parts' values, so that is accurate to about 1e-10 and costs two builds of a
        few small matrices, against two simulations of every sample for a difference of the response.
        The edge instant needs no extra state: the circuit starts at rest and is time-invariant, so
        moving the edge later by dτ moves the whole response, ∂x/∂t50 = −dx/dt = −(A x + B u), and the
        EMF's ramp by −du/dt. Each channel's block is then one product of [states, u, du/dt] with a small
        matrix, written in place: the cost is about one pass over the Jacobian.
        """
        params = {k: v for k, v in values.items() if k != edge_parameter}
        model = self.model(params)
        p, q = self.rows(model)
        d_models = [self._model_derivative(params, name) for name in params]
        moved = replace(edge, t50_s=values.get(edge_parameter, edge.t50_s))
        xs, u = edge_states(with_sensitivities(model, [d.A for d in d_models], [d.B for d in d_models]),
                                 self.times, moved)
        n, columns = len(model.states), xs.shape[1]
        basis = np.empty((len(u), columns + 2))
        basis[:, :columns], basis[:, columns], basis[:, columns + 1] = xs, u, moved.slope(self.times)
        # weights[:, c, j]: channel c's derivative by value j is basis @ weights[:, c, j]
        weights = np.zeros((columns + 2, len(self.mapping), len(values)))
        for j, name in enumerate(values):
            if name == edge_parameter:
                weights[:n, :, j], weights[columns, :, j], weights[columns + 1, :, j] = (
                    -(p @ model.A).T, -(p @ model.B[:, 0]), -q)
                continue
            k = list(params).index(name)
            dp, dq = self.rows(d_models[k])
            weights[n * (1 + k):n * (2 + k), :, j], weights[:n, :, j], weights[columns, :, j] = p.T, dp.T, dq
            weights[:, :, j] /= _size(params[name])
        weights *= np.asarray(channel_scale, dtype=float).reshape(1, -1, 1)
        out = np.empty((len(self.mapping) * len(u), len(values)))
        for c in range(len(self.mapping)):
            np.matmul(basis, weights[:, c, :], out=out[c * len(u):(c + 1) * len(u)])
        return self._channels(model, xs[:, :n], u), out

    def _model_derivative(self, params: Mapping[str, float], name: str) -> StateSpace:
        """|p|·∂A/∂p, |p|·∂B/∂p, … for p = ``name`` (as a StateSpace of derivatives), by central differences
        of the builder at a step of 1e-6 of the value (see ``sensitivities``). Taken per
        relative change of p, they have the scale of the model's own matrices whatever p's unit (∂A/∂C is
        1e14 times A for 100 nF), so the sensitivity system stays well conditioned."""
        size = _size(params[name])
        plus = self.model({**params, name: params[name] + MATRIX_STEP_SHARE * size})
        minus = self.model({**params, name: params[name] - MATRIX_STEP_SHARE * size})
        return StateSpace(*((getattr(plus, k) - getattr(minus, k)) / (2 * MATRIX_STEP_SHARE) for k in "ABCD"),
                          states=plus.states, inputs=plus.inputs, outputs=plus.outputs)

    def align(self, model: StateSpace) -> Edge:
        """The edge placed by the stimulus channel when one is marked; otherwise as the metadata says."""
        marked = [i for i, m in enumerate(self.mapping) if m.stimulus]
        if not marked:
            return self.edge
        i = marked[0]
        p, q = self.rows(model)
        dt = self.times[1] - self.times[0]
        return align_edge(model, self.times, self.edge, self.measured[i] - self.mapping[i].offset, p[i], q[i],
                          max(ALIGN_SEARCH_SAMPLES * dt, 2 * self.edge.duration_s))


def _size(value: float) -> float:
    """The scale a parameter's derivative is taken on: its magnitude, or 1 at zero."""
    return abs(value) or 1.0


def _default_mapping(spec: CompareSpec, record: Record, model: StateSpace) -> tuple[ChannelMap, ...]:
    mapping = tuple(ChannelMap(name, Signal(name)) for name in record.channel_names if name in model.outputs)
    if not mapping:
        raise ConfigError(spec.source, "channels", f"no record channel is named like a model output "
                          f"({', '.join(model.outputs)}); record channels are {', '.join(record.channel_names)}: "
                          "map them in [dut.channels]")
    return mapping


def _setup(record: Record, spec: CompareSpec, label: str) -> _Setup:
    nominal = dict(spec.nominal)
    if "source_resistance_ohm" in spec.parameters and "source_resistance_ohm" not in nominal:
        nominal["source_resistance_ohm"] = record.stimulus.source_resistance_ohm
    model = spec.build(nominal)
    # Parameters the table left to the model (a netlist's own element values, a builder's default) start
    # a fit and are reported as nominal like the rest.
    nominal = {**{k: v for k, v in model.parameters.items() if k in spec.parameters}, **nominal}
    mapping = spec.channels if spec.channels is not None else _default_mapping(spec, record, model)
    measured, units = [], []
    for m in mapping:
        if m.channel not in record.channel_names:
            raise ConfigError(spec.source, f"channels.{m.channel}", f"{label} has no such channel; "
                              f"its channels are {', '.join(record.channel_names)}")
        samples = np.asarray(record.channel(m.channel).samples, dtype=float)
        if not np.all(np.isfinite(samples)):
            raise ConfigError(label, f"channel {m.channel}",
                              f"{int(np.sum(~np.isfinite(samples)))} samples are not finite numbers")
        measured.append(samples)
        units.append(record.channel(m.channel).unit)
    if record.timebase.n_samples < 3:
        raise ConfigError(label, "timebase", "needs at least 3 samples to compare")
    edge = Edge.from_stimulus(record.stimulus)
    try:
        steady_state(model, edge.before_v)
    except ValueError as exc:
        raise ConfigError(spec.source, "model", str(exc)) from None
    return _Setup(spec, record.timebase.times(), mapping, np.array(measured), tuple(units), nominal, edge)


def _weights(setup: _Setup, nominal_prediction: np.ndarray, weighting: str) -> np.ndarray:
    """Per-channel divisor of the residuals: the channel's noise RMS (at least its quantisation noise), or
    its simulated range."""
    spans = np.ptp(nominal_prediction, axis=1)
    if weighting == "amplitude":
        return np.where(spans > 0, spans, 1.0)
    noise = np.array([max(noise_rms(setup.times, y, setup.edge.start_s), quantisation_rms(y, code))
                      for y, code in zip(setup.measured, setup.sample_code_steps)])
    return np.maximum(noise, WEIGHT_FLOOR_SHARE * np.where(spans > 0, spans, 1.0))


_NOMINAL_SENSITIVITIES = Memo()  # the start of a fit: the same for every record of a run whose edge falls alike
START_RTOL = 1e-14  # a point this close to the start (the rounding of its coordinates) is the start


def _nominal_sensitivities(setup: _Setup, edge: Edge, start: dict[str, float]) -> tuple[np.ndarray, np.ndarray]:
    """(predicted channels, unweighted Jacobian) at a fit's starting values, remembered.

    The rank test takes its Jacobian at the nominal values whatever the warm start, so in a run every
    record asks for the same one while the edge falls on the same instant (an edge the samples do not
    resolve sits on a whole sample, as the demo's does): one propagation saved per record, of the three
    a warm-started fit costs. Anything that cannot be a key (a state_space model's matrices) is computed.
    """
    def compute() -> tuple[np.ndarray, np.ndarray]:
        return setup.response_and_sensitivities(start, edge, EDGE_PARAMETER, np.ones(len(setup.mapping)))

    try:
        return _NOMINAL_SENSITIVITIES.get((setup.spec.model, setup.spec.source, tuple(setup.nominal.items()),
                                           tuple(start.items()), setup.times, edge, setup.mapping), compute)
    except TypeError:  # unhashable parameters
        return compute()


def _fit(setup: _Setup, edge: Edge, warm_start: Mapping[str, float] | None = None) -> FitResult:
    """Identify the free parameters. With a stimulus channel and an edge the samples resolve, the edge
    instant is fitted alongside them, since aligning it with a model whose parameters are still wrong
    would bias both; an unresolved edge keeps the whole-sample position the alignment found."""
    spec = setup.spec
    infos = spec.parameters
    free = {n: Free(setup.nominal[n], infos[n].sign != "any", abs(setup.nominal[n]) or 1.0, infos[n].unit)
            for n in spec.fit.free}
    dt = setup.times[1] - setup.times[0]
    if any(m.stimulus for m in setup.mapping) and edge.resolved(dt):
        free[EDGE_PARAMETER] = Free(edge.t50_s, False, dt, "s")
    start = {n: f.start for n, f in free.items()}
    nominal_prediction, nominal_jacobian = _nominal_sensitivities(setup, edge, start)
    weights = _weights(setup, nominal_prediction, spec.fit.weighting)[:, None]
    samples = len(setup.times)

    last: dict[str, Any] = {}

    def evaluated(values: dict[str, float]) -> tuple[np.ndarray, np.ndarray]:
        """(residuals, Jacobian) at ``values`` from one propagation; the solver asks for the residuals of
        a point and then, when it takes the step, for its Jacobian, so the pair of the last point is kept."""
        key = tuple(values.items())
        if last.get("key") != key:
            if values.keys() == start.keys() and np.allclose(list(values.values()), list(start.values()),
                                                             rtol=START_RTOL, atol=0.0):
                predicted = nominal_prediction
                jacobian = (nominal_jacobian.reshape(len(weights), samples, -1)
                            * (-1 / weights)[:, :, None]).reshape(nominal_jacobian.shape)
            else:
                predicted, jacobian = setup.response_and_sensitivities(values, edge, EDGE_PARAMETER, -1 / weights)
            last.update(key=key, pair=(((setup.measured - predicted) / weights).ravel(), jacobian))
        return last["pair"]

    def residuals_of(values: dict[str, float]) -> np.ndarray:
        return evaluated(values)[0]

    def jacobian_of(values: dict[str, float]) -> np.ndarray:
        return evaluated(values)[1]

    hold_order = (*spec.fit.hold, *DEFAULT_HOLD.get(spec.model, ()))
    warm = {k: v for k, v in (warm_start or {}).items() if k != EDGE_PARAMETER}  # the edge is this record's own
    return fit_parameters(residuals_of, jacobian_of, free, hold_order, spec.fit.weighting, (EDGE_PARAMETER,),
                          len(setup.mapping), warm)


def _polarity(model: StateSpace, signal: Signal, gain: float, edge: Edge, span: float) -> str | None:
    """Direction of the signal's step between the two rest states; None when it returns to where it was."""
    c, d = signal.row(model)
    x0, x1 = model.steady_state(edge.before_v), model.steady_state(edge.after_v)
    change = gain * (c @ (x1 - x0) + d * (edge.after_v - edge.before_v))
    if abs(change) <= STEP_MIN_SHARE * span:
        return None
    return "rising" if change > 0 else "falling"


def _measured_states(setup: _Setup, model: StateSpace, u: np.ndarray) -> dict[str, np.ndarray]:
    """States reconstructed from the mapped channels by least squares (e.g. i_L = v_R / R), for the states
    the channels determine; a state outside the row space of the signals cannot be reconstructed."""
    p, q = setup.rows(model)
    offsets = np.array([m.offset for m in setup.mapping])
    z = setup.measured - offsets[:, None] - np.outer(q, u)
    pinv = np.linalg.pinv(p)
    determined = np.abs(pinv @ p - np.eye(p.shape[1])).max(axis=1) < 1e-8
    x_hat = pinv @ z
    return {name: x_hat[i] for i, name in enumerate(model.states) if determined[i]}


def _warnings(channels: list[ChannelResult], spans: np.ndarray) -> list[str]:
    out = []
    for ch, span in zip(channels, spans):
        if ch.baseline_error is not None and span > 0 and abs(ch.baseline_error) > BASELINE_WARN_SHARE * span:
            out.append(f"{ch.channel}: the pre-trigger baseline is {ch.baseline_error:+.4g} {ch.unit} away from "
                       f"the model's rest value ({100 * abs(ch.baseline_error) / span:.1f} % of the range): the DUT "
                       "was not at rest before the edge, or the levels, gain or offset are off")
    return out


_PREDICTIONS = Memo()  # the nominal model's traces, the same for every record of a campaign without fits

CLIP_MIN_SAMPLES = 3  # samples on a rail of the scope's span before a channel counts as clipped


def clipping_warnings(record: Record, channels: Sequence[str]) -> list[str]:
    """Channels with samples on the top or bottom code of the scope's span, from the read-back settings.

    A clipped trace flattens the overshoot and biases every fit, and it is a set-up fault, not the DUT's:
    say so rather than let it pass as a parameter change. An 8-bit span of ±range_v has a step of
    range_v/128; its codes run from offset − range_v to offset + range_v − step (common practice).
    """
    scope_channels = record.settings.get("scope", {}).get("channels", {}) if record.settings else {}
    out = []
    for name in channels:
        channel = record.channel(name)
        setup = scope_channels.get(channel.source)
        if not setup or "range_v" not in setup:
            continue
        step = setup["range_v"] / 128
        low = setup.get("offset_v", 0.0) - setup["range_v"]
        top = low + 255 * step
        slack = step / 4  # the volts went through float32 on the way
        railed = int(np.count_nonzero(channel.samples <= low + slack) + np.count_nonzero(channel.samples >= top - slack))
        if railed >= CLIP_MIN_SAMPLES:
            out.append(f"{name}: {railed} sample(s) on the edge of the scope's span {low:.4g} .. "
                       f"{low + 2 * setup['range_v']:.4g} {channel.unit}: the trace is clipped; widen range_v "
                       f"for {channel.source} before trusting this comparison")
    return out


def _traces(setup: _Setup, model: StateSpace, x: np.ndarray, predicted: np.ndarray, u: np.ndarray) -> Traces:
    return Traces(setup.times, u, {m.channel: y for m, y in zip(setup.mapping, setup.measured)},
                  {m.channel: y for m, y in zip(setup.mapping, predicted)},
                  dict(zip((m.channel for m in setup.mapping), setup.units)), model.states, model.state_units, x,
                  _measured_states(setup, model, u))


def stored_traces(record: Record, spec: CompareSpec, analysis: Mapping[str, Any], label: str = "") -> Traces:
    """The traces of a comparison stored with ``record`` (``CompareResult.to_dict()``), for its figures.

    The model is simulated once more with the parameters and the edge instant the comparison ended with
    (``analysis["parameters"]``, ``analysis["stimulus"]["t50_s"]``), not fitted again: drawing a stored
    result costs one simulation, where comparing again costs a fit. ``spec`` is the table the analysis was
    made with (the record's own [dut]).
    """
    setup = _setup(record, spec, label or f"record {record.index}")
    try:
        parameters = {k: float(v) for k, v in analysis["parameters"].items()}
        edge = replace(setup.edge, t50_s=float(analysis["stimulus"]["t50_s"]))
    except (KeyError, TypeError, ValueError, AttributeError):
        raise ConfigError(label or f"record {record.index}", "analysis",
                          "the stored analysis has no parameters or edge instant to simulate with") from None
    model = setup.model(parameters)
    x, predicted, u = setup.predict(model, edge)
    return _traces(setup, model, x, predicted, u)


def compare_spec(record: Record, spec: CompareSpec, label: str = "",
                 warm_start: Mapping[str, float] | None = None) -> CompareResult:
    """Compare ``record`` with the validated ``spec``: the one entry point the API, CLI and report share.

    ``label`` names the record in error messages (a file name); by default "record N". ``warm_start``
    (fitted values of an earlier record, ``fitted_values``) is where a fit's solver begins; the result
    is the same optimum as from the nominal values (see ``fit_parameters``).
    """
    samples_per_channel = record.timebase.n_samples
    record, every = _every_kth_sample(record)
    setup = _setup(record, spec, label or (f"record {record.index}" if record.index is not None else "the record"))
    edge = setup.align(setup.model())
    fit = _fit(setup, edge, warm_start) if spec.fit.free else None
    fitted = {k: v for k, v in fit.values.items() if k not in fit.nuisance} if fit else {}
    if fit and EDGE_PARAMETER in fit.values:
        edge = replace(edge, t50_s=fit.values[EDGE_PARAMETER])
    parameters = {**setup.nominal, **fitted}
    model = setup.model(parameters)
    # the memory serves comparisons without a fit; a fit's traces differ every record, and hashing them costs
    x, predicted, u = (setup.predict(model, edge) if fit else
                       _PREDICTIONS.get((model.A, model.B, model.C, model.D, setup.times, edge, setup.mapping),
                                        lambda: setup.predict(model, edge)))
    spans = np.ptp(predicted, axis=1)
    channels = []
    for i, (m, unit, meas, sim, span) in enumerate(zip(setup.mapping, setup.units, setup.measured, predicted,
                                                       spans)):
        code_step = record_code_step(record, m.channel)
        channels.append(channel_result(m.channel, m.signal.text, unit, m.gain, m.offset, setup.times, meas, sim,
                                       _polarity(model, m.signal, m.gain, edge, span), edge.start_s,
                                       spec.tolerances.settling_band_pct,
                                       setup.sample_code_steps[i] if code_step is None else code_step,
                                       remember=fit is None))
    verdict, notes = judge(channels, fit, spec.tolerances)
    traces = _traces(setup, model, x, predicted, u)
    marked = [m.channel for m in setup.mapping if m.stimulus]
    timing = (f"placed by channel {marked[0]} ({edge.t50_s - setup.edge.t50_s:+.3g} s from the trigger)" if marked
              else record.settings.get(TIMING_SETTING, "from the record's metadata (t50 at the trigger)"))
    stimulus = {"before_v": edge.before_v, "after_v": edge.after_v, "t50_s": edge.t50_s,
                "duration_s": edge.duration_s, "timing": timing}
    record_info = {"index": record.index, "utc": record.utc, "channels": record.channel_names,
                   "dut": dict(spec.identity), "profile_sha256": record.profile_sha256}
    thinned = [f"compared on one sample in {every} ({samples_per_channel:,} per channel; a comparison uses at "
               f"most {MAX_COMPARED_SAMPLES:,})"] if every > 1 else []
    return CompareResult(record_info, spec.model, dict(setup.nominal), parameters, stimulus, channels, fit,
                         verdict, clipping_warnings(record, [m.channel for m in setup.mapping])
                         + _warnings(channels, spans) + notes + thinned, traces=traces)


# The fit's dense Jacobian (samples × channels × unknowns, with the solver's copies) is what a long record
# costs: `acqd compare` of 1e6 samples of three channels peaked at 1.2 GiB (bench/memory.py), and issue 10's
# probe saw 10.6 GiB at the 1e7 a record may have. Beyond this many
# samples per channel a record is compared on every k-th one (the t = 0 sample kept), so a comparison's
# memory stays bounded; the fitted values' intervals widen by about √k, and they say so.
MAX_COMPARED_SAMPLES = 250_000


def _every_kth_sample(record: Record) -> tuple[Record, int]:
    """(``record`` with every k-th sample, k), k the smallest that leaves at most MAX_COMPARED_SAMPLES."""
    base = record.timebase
    every = -(-base.n_samples // MAX_COMPARED_SAMPLES)
    if every == 1:
        return record, 1
    first = base.pretrigger_samples % every  # the kept samples fall on t = m·k·dt, the trigger's among them
    channels = [replace(ch, samples=np.ascontiguousarray(ch.samples[first::every])) for ch in record.channels]
    timebase = replace(base, sample_interval_s=base.sample_interval_s * every,
                       pretrigger_samples=base.pretrigger_samples // every, n_samples=len(channels[0].samples))
    return replace(record, channels=channels, timebase=timebase), every


def compare(record: Record, model_spec: Mapping[str, Any], mapping: Mapping[str, Any] | None = None,
            tolerances: Mapping[str, Any] | None = None, fit: Mapping[str, Any] | None = None,
            source: str = "compare()") -> CompareResult:
    """Compare a record with a model given as plain tables (the shapes of ``[dut]``, see ``spec``).

    ``model_spec`` is ``{"model": name, **nominal parameters}``; ``mapping`` is ``[dut.channels]``,
    ``tolerances`` ``[dut.tolerances]``, ``fit`` ``[dut.fit]`` (e.g. ``{"free": ["r_ohm", "c_f"]}``).
    """
    return compare_spec(record, spec_from_parts(model_spec, mapping, tolerances, fit, source))

