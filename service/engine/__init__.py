"""The engine: the single writer of estimator state (micro-batches, dead letters), its typed operations, and the
immutable snapshots readers see.
"""
