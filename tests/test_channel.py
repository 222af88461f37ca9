"""The channel's per-reading numerics (`zeroline.channel`): the published uncertainty's
quadratic form against exact rational arithmetic, the squared-weight information, the
forecast function's validity.

Reference: exact arithmetic with Python's `fractions.Fraction` on the very floats the
channel holds (its factor R, its matrix S, the prior weight), so the only error measured is
the channel's own rounding (common practice, no source).
"""

from __future__ import annotations

import dataclasses
import json
import math
from fractions import Fraction

import numpy as np
import pytest

from zeroline.channel import Channel, Corrected, Sample, SquaredInformation, _published
from zeroline.config import parse_config

DAY = 86400.0
START = 1793491200.0
CONFIG = """
channels:
  - name: cell
    topic: site/cell
    basis:
      - constant
      - polynomial: {of: t, degree: 2, scale: 30d}
      - periodic: {of: t, period: 24h}
      - polynomial: {of: temperature, degree: 1, center: 20}
    inputs: {temperature: {field: temperature}}
    memory: {half_life: 7d}
    alerts: {drift_limit: 3, horizon: 10d}
"""


def _readings(count: int, seed: int = 3) -> list[Sample]:
    rng = np.random.default_rng(seed)
    samples = []
    for k in range(count):
        t = 600.0 * k
        temperature = 20 + 6 * math.sin(2 * math.pi * t / DAY) + rng.normal(0, 0.5)
        value = 1.0 + 0.3 * t / DAY + 0.05 * (temperature - 20) + rng.normal(0, 0.2)
        samples.append(Sample(START + t, value, {"temperature": temperature}))
    return samples


def _exact_sandwich(channel: Channel, phi: np.ndarray) -> Fraction:
    """φᵀ·P(S + a·diag(prior_sd)⁻²)P·φ exactly, P = (RᵀR)⁻¹ from the channel's own floats."""
    estimator = channel.estimator
    p = estimator.n_terms
    r = [[Fraction(float(x)) for x in row[:p]] for row in estimator._factor[:p, :p]]
    info = [[sum(r[k][i] * r[k][j] for k in range(p)) for j in range(p)] for i in range(p)]
    rows = [info[i] + [Fraction(float(phi[i]))] for i in range(p)]
    for c in range(p):  # Gauss-Jordan: v = (RᵀR)⁻¹φ
        pivot = next(i for i in range(c, p) if rows[i][c] != 0)
        rows[c], rows[pivot] = rows[pivot], rows[c]
        for i in range(p):
            if i != c and rows[i][c] != 0:
                factor = rows[i][c] / rows[c][c]
                rows[i] = [a - factor * b for a, b in zip(rows[i], rows[c], strict=True)]
    v = [rows[i][p] / rows[i][i] for i in range(p)]
    squared = channel._squared.matrix()
    prior = Fraction(estimator.prior_weight) / Fraction(float(estimator.prior_sd[0])) ** 2
    data = sum(v[i] * Fraction(float(squared[i, j])) * v[j] for i in range(p) for j in range(p))
    return data + prior * sum(x * x for x in v)


def test_published_uncertainty_is_the_exact_quadratic_form_to_1e_12() -> None:
    """u = σ̂·√(φᵀP(S + prior)Pφ) by two triangular solves, checked against exact arithmetic
    early (few samples: P is prior-dominated and ill-conditioned) and late. Measured when
    set: worst 5e-14 relative; forming P and the product P·M·P, as the channel did before,
    gave 1.1e-11 here (and up to 4e-9 in other runs)."""
    config = parse_config(CONFIG).channels[0]
    channel = Channel(config)
    basis = config.basis.with_epoch(START)
    worst = 0.0
    for k, sample in enumerate(_readings(3000)):
        result, _ = channel.process(sample)
        if k in (14, 20, 40, 82, 150, 400, 1000, 2999):
            phi = basis.row(sample.time - START, dict(sample.fields))
            exact = channel.estimator.residual_sd * math.sqrt(_exact_sandwich(channel, phi))
            assert result.uncertainty is not None
            worst = max(worst, abs(result.uncertainty - exact) / exact)
    assert worst < 1e-12, worst


def test_squared_information_is_symmetric_and_survives_its_snapshot_exactly() -> None:
    """Only the upper triangle is updated (BLAS dsyr); `matrix()` is the full symmetric S,
    the quadratic form equals vᵀ(S + cI)v, and a restored S computes the same bits."""
    rng = np.random.default_rng(8)
    squared = SquaredInformation(4, half_life=DAY)
    expected = np.zeros((4, 4))
    for k in range(200):
        row, weight = rng.normal(size=4), rng.uniform(0.1, 1.0)
        if k:
            expected *= 4.0 ** (-600.0 / DAY)
        expected += weight**2 * np.outer(row, row)
        squared.add(row, weight**2, 600.0 * k)
    np.testing.assert_allclose(squared.matrix(), expected, rtol=1e-12)
    v = rng.normal(size=4)
    assert squared.quadratic(v, 0.3) == pytest.approx(
        float(v @ (expected + 0.3 * np.eye(4)) @ v), rel=1e-12
    )
    restored = SquaredInformation.from_state(json.loads(json.dumps(squared.to_state())))
    assert restored.quadratic(v, 0.3) == squared.quadratic(v, 0.3)


def test_a_forecast_function_is_refused_after_the_next_reading() -> None:
    """The forecast reads the model out when first called; after another reading that
    read-out would be of a different model, so the function raises instead of lying."""
    config = parse_config(CONFIG).channels[0]
    channel = Channel(config)
    samples = _readings(200)
    for sample in samples[:-1]:
        channel.process(sample)
    forecast = channel._forecaster()
    times = np.linspace(samples[-2].time, samples[-2].time + 5 * DAY, 20)
    mean, spread = forecast(times)
    assert np.all(np.isfinite(mean)) and np.all(spread > 0)
    channel.process(samples[-1])
    with pytest.raises(RuntimeError, match="next reading"):
        forecast(times)
    fresh_mean, _ = channel._forecaster()(times)  # a new one, made after the reading, works
    assert np.all(np.isfinite(fresh_mean)) and not np.array_equal(fresh_mean, mean)


def test_a_configured_epoch_reads_the_inputs_as_the_first_reading_epoch_does() -> None:
    """With `epoch:` in the config the basis is bound when the channel is made; the inputs
    it reads must still be looked up (they were not: a KeyError on the first reading). An
    epoch equal to the first reading's time gives the same results bit for bit."""
    configured = parse_config(CONFIG.replace("    memory:", f"    epoch: {START}\n    memory:"))
    assert configured.channels[0].epoch == START
    fixed = Channel(configured.channels[0])
    first_reading = Channel(parse_config(CONFIG).channels[0])
    for sample in _readings(100):
        ours, _ = fixed.process(sample)
        theirs, _ = first_reading.process(sample)
        assert ours.coefficients is not None and theirs.coefficients is not None
        assert ours.coefficients.tobytes() == theirs.coefficients.tobytes()
        assert ours.to_json() == theirs.to_json()  # NaN (no σ̂ yet) is None there


def test_the_fast_published_reading_equals_the_dataclass_constructor() -> None:
    """`_published` fills a `Corrected` without its generated constructor: it must be the
    very same value (every field, equality, the JSON payload) and stay frozen."""
    values = (1.5e9, 2.0, 1.5, 0.5, 0.1, "ok", 1, ("capped",), None, -0.0, True, np.ones(3))
    fast, slow = _published(*values), Corrected(*values)
    names = [f.name for f in dataclasses.fields(Corrected)]
    assert len(names) == len(values)
    for name in names:
        assert getattr(fast, name) is getattr(slow, name)
    assert fast.to_json() == slow.to_json() and repr(fast) == repr(slow)
    with pytest.raises(dataclasses.FrozenInstanceError):
        fast.raw = 3.0  # type: ignore[misc]
