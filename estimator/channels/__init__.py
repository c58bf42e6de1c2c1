"""The multi-channel machinery: a channel's settings and per-sample rules, regressors from term lists, groups of
channels of one shape applied in rounds (one sample at a time or as whole columns), and the whole state out and
back in.
"""
