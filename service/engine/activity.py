"""What the engine remembers of each channel's traffic, beside the estimator state: when it last applied a
sample (wall clock) and how many of its samples were refused since. Quality is judged from it."""

from __future__ import annotations

from dataclasses import dataclass, field

__all__ = ["ChannelActivity"]


@dataclass
class ChannelActivity:
    """Per channel id; written by the engine thread only, read by its snapshot publisher."""

    updated_at: dict[str, float] = field(default_factory=dict)        # wall clock of the last applied sample
    refused_in_a_row: dict[str, int] = field(default_factory=dict)    # refused since the last applied one
    last_refusal: dict[str, str] = field(default_factory=dict)        # the newest refusal's reason

    def refused(self, channel: str, reason: str) -> None:
        self.refused_in_a_row[channel] = self.refused_in_a_row.get(channel, 0) + 1
        self.last_refusal[channel] = reason
