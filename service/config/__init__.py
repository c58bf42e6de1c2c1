"""Configuration: the settings model read from TOML and RWLS_* variables, validated by key; alarm and token tables;
the plant-wide false-alarm budget.
"""
