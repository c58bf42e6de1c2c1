"""Offline runs over CSV histories: replay and fit, the trace, the text tables and the commissioning report with
its plots.
"""
