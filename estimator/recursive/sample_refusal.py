"""Why the estimator refuses a sample: one stable code per reason, the same on every path.

A refused sample changes no estimate and does not advance its channel's time or sequence, so it never
blocks the samples after it. The service counts refusals by these codes and dead-letters the message.
"""

from __future__ import annotations

from enum import StrEnum

__all__ = ["SampleRefusal"]


class SampleRefusal(StrEnum):
    # The sample's own values
    NON_FINITE = "non_finite"              # y, an input, sigma or weight is NaN or infinite
    BAD_SIGMA = "bad_sigma"                # sigma <= 0, or 1 / sigma^2 is no usable weight
    BAD_WEIGHT = "bad_weight"              # weight <= 0 (given, or after the weight rules)
    MISSING_WEIGHT = "missing_weight"      # sample weighting, and the sample gives neither sigma nor weight
    MISSING_INPUT = "missing_input"        # an input the channel's terms use is absent
    BAD_TIME = "bad_time"                  # t is not finite
    MISSING_TIME = "missing_time"          # a half-life in seconds needs the sample's time
    # Order within the channel
    DUPLICATE_SEQ = "duplicate_seq"        # seq equals the last accepted one (a redelivery)
    OUT_OF_ORDER_SEQ = "out_of_order_seq"
    DUPLICATE_TIME = "duplicate_time"      # t equals the last accepted one
    OUT_OF_ORDER = "out_of_order"          # t before the last accepted one
    # Calls into the estimator arrays
    BAD_SHAPE = "bad_shape"
    BAD_CHANNEL = "bad_channel"
    DUPLICATE_CHANNEL = "duplicate_channel"
    UNKNOWN_CHANNEL = "unknown_channel"    # no channel of that id in the bank
    INTERNAL = "internal"                  # a path left a sample without an outcome (a bug, never silent)
