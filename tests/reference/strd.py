"""Reader for the NIST StRD linear least squares datasets kept in tests/reference/data/nist_strd/.

One JSON file per dataset, converted once from NIST's ``.dat`` files: the data
rows and the certified values (estimates, their standard deviations, residual
standard deviation, R^2), every number a string exactly as NIST prints it, and
the model equation of the file's header. Each file names its source:
NIST Statistical Reference Datasets, linear regression; public-domain data and
certified values, https://www.itl.nist.gov/div898/strd/.
"""

from __future__ import annotations

import json
import math
import re
from dataclasses import dataclass
from pathlib import Path

import numpy as np

STRD_DIR = Path(__file__).resolve().parent / "data" / "nist_strd"


@dataclass(frozen=True)
class StrdCase:
    """One StRD dataset: raw data tokens, model terms, certified values."""

    name: str
    columns: list[str]            # data columns as in the file, y first
    rows: list[list[str]]         # the data exactly as printed (strings, so CSVs keep every digit)
    terms: list[str]              # our term list for the model in the header
    beta: np.ndarray
    beta_sd: np.ndarray
    residual_sd: float


def _terms(equation: str, predictors: list[str]) -> list[str]:
    """Our term list for a StRD model equation: ``B0`` is the intercept; one predictor
    with ``x**k`` terms is a polynomial of the highest power (Filip writes ``...``)."""
    terms = ["1"] if re.search(r"\bB0\b", equation) else []
    if len(predictors) == 1:
        powers = [int(p) for p in re.findall(r"x\*\*(\d+)", equation)]
        degree = max(powers) if powers else 1
        return [*terms, "x", *(f"x^{k}" for k in range(2, degree + 1))]
    return terms + predictors


def read_case(name: str) -> StrdCase:
    """Load ``<name>.json`` (``name`` as NIST spells it, e.g. ``"Norris"``)."""
    doc = json.loads((STRD_DIR / f"{name.lower()}.json").read_text(encoding="utf-8"))
    if doc["dataset"] != name:
        raise ValueError(f"name: {name!r} is not the dataset in its file ({doc['dataset']!r})")
    certified = doc["certified"]
    columns = list(doc["columns"])
    terms = _terms(doc["model"], [c for c in columns if c != "y"])
    parameters = certified["parameters"]
    if len(terms) != len(parameters):
        raise ValueError(f"{name}: {len(terms)} terms for {len(parameters)} certified parameters")
    return StrdCase(name, columns, [list(r) for r in doc["rows"]], terms,
                    np.array([float(p[1]) for p in parameters]), np.array([float(p[2]) for p in parameters]),
                    float(certified["residual_std_dev"]))


def dataset_names() -> list[str]:
    """Every dataset kept in :data:`STRD_DIR`, as NIST spells the names."""
    return sorted(json.loads(p.read_text(encoding="utf-8"))["dataset"] for p in STRD_DIR.glob("*.json"))


def log_relative_error(computed: np.ndarray | float, certified: np.ndarray | float) -> float:
    """Minimum LRE over the entries (McCullough 1998): -log10(|c - t| / |t|), or
    -log10(|c - t|) where the certified value is 0; capped at 15 (NIST prints 15 digits)."""
    c = np.atleast_1d(np.asarray(computed, dtype=float))
    t = np.atleast_1d(np.asarray(certified, dtype=float))
    out = []
    for value, truth in zip(c, t, strict=True):
        if not math.isfinite(value):
            out.append(0.0)
            continue
        err = abs(value - truth) if truth == 0 else abs(value - truth) / abs(truth)
        out.append(15.0 if err == 0 else min(15.0, max(0.0, -math.log10(err))))
    return min(out)
