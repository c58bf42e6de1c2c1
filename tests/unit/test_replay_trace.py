"""The replay trace stays bounded and evenly spread however long the history."""

from __future__ import annotations

from estimator.channels.channel import ChannelSettings, Sample
from estimator.channels.channel_bank import ChannelBank
from service.offline.trace import ReplayTrace


def test_the_trajectory_is_thinned_to_a_bound_keeping_every_stride_th_sample() -> None:
    bank = ChannelBank({"a": ChannelSettings(terms=("1", "u"))})
    trace = ReplayTrace(max_points=16)
    for k in range(1000):
        outcome = bank.apply_one(Sample("a", 1.0 + 0.5 * (k % 7), {"u": float(k % 7)}, float(k), None, None))
        assert outcome.status == "applied"
        trace.row("a", outcome.regressor, 1.0 + 0.5 * (k % 7), outcome.weight)
        trace.observe(bank, "a", float(k))
    channel = trace.channels["a"]
    # At 16 points the trace halves and keeps every second sample after: 1000 samples end at stride 128.
    assert 8 <= len(channel.t) < 16 and channel.stride == 128
    assert channel.t == [float(128 * i) for i in range(len(channel.t))]     # every stride-th sample, from the first
    assert all(len(v) == len(channel.t) for v in (channel.parameters, channel.noise_sigma, channel.innovation,
                                                  *channel.statistics.values(), *channel.limits.values()))
    assert len(channel.Z) == len(channel.y) == len(channel.weight) == 1000     # the rows are all kept
