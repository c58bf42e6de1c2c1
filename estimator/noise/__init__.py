"""The noise trackers: the online noise-variance tracker and the operating-point log-variance model that make the
weights.
"""
