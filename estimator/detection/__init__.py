"""The detectors and their run lengths: noise level, variance, offset and drift, each channel's noise-shape
calibration, baselines, commissioning, and the quantiles they rest on.
"""
