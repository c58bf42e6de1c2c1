"""Run lengths and detection delays of the offset and variance detectors by noise shape (our own Monte Carlo).

The nominal in-control ARLs are the Gaussian design values: the Brook & Evans (1972)
Markov chain for the offset CUSUM (which reproduces Lucas & Crosier 1982, Table 1:
tests/reference/test_run_length.py) and the simulated fit ``VARIANCE_FIT`` for the
differenced variance CUSUM (service/config/false_alarm_budget.py, re-measured in
tests/reference/test_fleet_budget.py). Every measured value here is our own Monte
Carlo over many channels at once through the DetectorBank, with fixed seeds; each
channel learns its baseline sigma from 1,000 commissioning samples of its own noise,
then its noise shape from 1,000 more (the defaults).

Run lengths are measured at shortened thresholds (offset h = 2.5, variance h = 16,
nominal ARLs of a few hundred samples) so that each shape takes a few seconds; the
default thresholds' ARLs (millions of samples) are beyond a unit test's reach. The
estimate is the exposure (samples judged) over the number of first raises, the
maximum-likelihood rate of a geometric run length with censoring; its standard error
is ARL / sqrt(raises).
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import stats

from estimator.detection.detectors import DEFAULT_TIMING, DetectorSettings
from estimator.detection.run_length import offset_arl
from service.config.false_alarm_budget import VARIANCE_FIT
from tests.gain_drift import first_alarms, raises
from tests.noise_shapes import PERIOD, SHAPES, Run, simulate

SHORT = DetectorSettings(offset_h=2.5, variance_h=16.0)
NOMINAL = {"offset": offset_arl(2.5, 1.0), "variance": math.exp(VARIANCE_FIT[0] + VARIANCE_FIT[1] * 16.0)}


def _arl(run: Run, kind: str) -> tuple[float, float]:
    """Mean run length (samples) from each channel's first raise, and its standard error."""
    first = run.first_raise(kind)
    raised = np.isfinite(first)
    exposure = float(np.where(raised, first + 1.0, run.samples).sum())
    count = int(raised.sum())
    assert count >= 100, (kind, count)          # enough raises for the standard error to mean something
    arl = exposure / count
    return arl, arl / math.sqrt(count)


@pytest.mark.parametrize("shape", SHAPES)
def test_in_control_run_length_is_within_a_factor_of_two_of_the_gaussian_design(shape: str) -> None:
    # Our own Monte Carlo, 400 channels x 3,000 samples each. The band [nominal / 2, 2 nominal] must hold the
    # whole +-4 standard-error interval of the estimate.
    run = simulate(shape, SHORT, channels=400, samples=3000, seed=SHAPES.index(shape) + 11)
    for kind, nominal in NOMINAL.items():
        arl, se = _arl(run, kind)
        assert nominal / 2.0 < arl - 4.0 * se and arl + 4.0 * se < 2.0 * nominal, (kind, arl, se, nominal)


def test_without_a_shape_table_heavy_tails_shorten_the_run_lengths() -> None:
    # The failure the noise-shape table removes (our own Monte Carlo): t_3 noise of unit variance judged as
    # if Gaussian (calibration_samples = 0) raises the offset alarm several times too often.
    run = simulate("t3", DetectorSettings(calibration_samples=0, offset_h=2.5, variance_h=16.0), channels=400,
                   samples=1000, seed=3)
    arl, se = _arl(run, "offset")
    assert arl + 4.0 * se < NOMINAL["offset"] / 2.0, (arl, se)


def test_the_gaussian_special_case_reproduces_the_published_run_lengths() -> None:
    # Without a shape table the offset CUSUM is the tabular CUSUM on N(shift, 1): Lucas & Crosier (1982),
    # Table 1, k = 0.5, h = 4: ARL 168 in control, 8.38 for a 1-sigma shift. Exact reference (sigma 1), a
    # scale that never moves; tolerance 4 standard errors of our own Monte Carlo plus the table's rounding.
    settings = DetectorSettings(calibration_samples=0, offset_k=0.5, offset_h=4.0, offset_scale_half_life=1e15)
    for shift, published, samples in ((0.0, 168.0, 1500), (1.0, 8.38, 100)):
        run = simulate("gaussian", settings, channels=2000, samples=samples, seed=4, commissioning=0,
                       change=lambda e, n, s=shift: e + s)
        arl, se = _arl(run, "offset")
        assert abs(arl - published) < 4.0 * se + 0.005 * published, (shift, arl, se)


# Detection delays at the default thresholds (offset h = 8, variance h = 60), from the change's first sample:
# zero-state, in samples. Our own Monte Carlo; the Gaussian delays measured with the same code (seed 9, 100
# channels per change) were 144 (doubled variance), 9.1 (2 sigma), 5.3 (3 sigma).
CHANGES = {"variance": lambda e: e * math.sqrt(2.0), "offset2": lambda e: e + 2.0, "offset3": lambda e: e + 3.0}
# The stated cost: a doubled variance is found later under heavy tails, because their normal scores' variance
# grows less than two-fold when the noise's does (measured 4.7x the Gaussian delay for t_3, 2.9x for Laplace,
# 2.3x for t_5). Part of it is in the data (t_3 and Laplace noise carry half the Gaussian's Fisher information
# about scale, so even the best detector would take about twice as long), the rest is the price of normal
# scores, which are not the efficient score for a heavy-tailed scale. Every other delay: within 1.5x.
VARIANCE_COST = {"t3": 5.0, "laplace": 3.5, "t5": 2.5}


def _delays(shape: str) -> dict[str, tuple[float, float, Run]]:
    groups = 100
    channels = groups * len(CHANGES)

    def change(eps: np.ndarray, n: int) -> np.ndarray:
        out = eps.copy()
        for g, apply in enumerate(CHANGES.values()):
            out[g * groups:(g + 1) * groups] = apply(eps[g * groups:(g + 1) * groups])
        return out

    run = simulate(shape, DetectorSettings(), channels=channels, samples=6000, seed=9, change=change)
    out = {}
    for g, name in enumerate(CHANGES):
        kind = "variance" if name == "variance" else "offset"
        first = run.first_raise(kind)[g * groups:(g + 1) * groups] + 1.0
        assert np.isfinite(first).all(), (shape, name, int(np.isnan(first).sum()))
        out[name] = (float(first.mean()), float(first.std(ddof=1) / math.sqrt(groups)), run)
    return out


@pytest.fixture(scope="module")
def gaussian_delays() -> dict[str, tuple[float, float, Run]]:
    return _delays("gaussian")


@pytest.mark.parametrize("shape", SHAPES)
def test_detection_delays_by_noise_shape(shape: str, gaussian_delays: dict[str, tuple[float, float, Run]]) -> None:
    delays = gaussian_delays if shape == "gaussian" else _delays(shape)
    for name, (delay, se, run) in delays.items():
        reference = gaussian_delays[name][0]
        bound = (VARIANCE_COST.get(shape, 1.5) if name == "variance" else 1.5) * reference
        assert delay - 4.0 * se < bound, (name, delay, se, bound)
        # No alarm raised twice on one channel within its off-delay (the chattering: twice in 150 s).
        for kind in ("offset", "variance", "noise_level"):
            assert run.quickest_repeat(kind) >= DEFAULT_TIMING[kind].off_delay, (name, kind)


@pytest.fixture(scope="module")
def gaussian_drift() -> float:
    return _drift_delay("gaussian")


def _drift_delay(shape: str) -> float:
    """Median samples from the start of a slow gain drift to the drift alarm, 40 channels (our own Monte Carlo)."""
    first = first_alarms(shape, 40, seed=3, rate=1e-4, before=2500, after=2000)
    assert not any((row < 0.0).any() for row in first.values()), "an alarm before the drift began"
    drift = first.get("drift", np.full(40, np.nan))
    assert np.isfinite(drift).all(), shape
    return float(np.median(drift))


@pytest.mark.slow
@pytest.mark.parametrize("shape", SHAPES)
def test_a_slow_gain_drift_is_found_as_soon_under_every_noise_shape(shape: str, gaussian_drift: float) -> None:
    # The whole ChannelBank (estimator, commissioning, calibration), y = 1 + b u + noise with the gain b creeping
    # up by 1e-4 a sample (0.02 % of it) from sample 2,500. Measured medians: 900 to 950 samples for every shape.
    delay = gaussian_drift if shape == "gaussian" else _drift_delay(shape)
    assert delay <= 1.5 * gaussian_drift, (delay, gaussian_drift)


@pytest.mark.slow
def test_healthy_channels_raise_no_more_than_twice_the_nominal_false_alarms_at_default_settings() -> None:
    # The experiment through the whole ChannelBank: 12 healthy channels of each shape x 20,000 samples
    # at default settings (18,000 judged after commissioning and calibration). Nominal rates per sample: offset
    # 1 / 2.2e7 (Markov chain, h = 8, k = 1), variance 1 / 1.9e6 (VARIANCE_FIT at h = 60), drift 1e-6 per check
    # every 25 samples, noise level none: 0.73 raises expected over the 1.3 million channel-samples. The count
    # must stay within the 99.9 % Poisson quantile of twice that, 6 (common practice: exact Poisson tail); the
    # detectors judging raw innovations raised 5 on the t_3 and Laplace channels alone (our own Monte Carlo).
    settings = DetectorSettings()
    judged = 20_000 - settings.commissioning_samples - settings.calibration_samples
    per_sample = 1.0 / offset_arl(8.0, 1.0, states=200) + math.exp(-VARIANCE_FIT[0] - VARIANCE_FIT[1] * 60.0) \
        + settings.drift_alpha / settings.drift_every
    expected = per_sample * judged * 12 * len(SHAPES)
    bound = 0
    while stats.poisson.sf(bound, 2.0 * expected) > 1e-3:
        bound += 1
    count = 0
    for shape in SHAPES:
        changes = raises(shape, 12, seed=SHAPES.index(shape) + 21, rate=0.0, before=20_000, after=0)
        count += sum(1 for _, _, active, _ in changes if active)
        last: dict[tuple[int, str], float] = {}
        for channel, kind, active, sample in changes:        # never raised twice within the off-delay
            if active:
                assert sample - last.get((channel, kind), -math.inf) >= DEFAULT_TIMING[kind].off_delay / PERIOD
                last[channel, kind] = sample
    assert count <= bound, (count, bound, expected)
