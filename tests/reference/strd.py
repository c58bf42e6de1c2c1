"""Reader for the NIST StRD linear least squares files in ../shared/reference/nist-strd/.

Certified values and data are both read from the files (their header names the
line ranges); nothing is typed in by hand. Format: see that folder's README.md.
"""

from __future__ import annotations

import math
import re
from dataclasses import dataclass
from pathlib import Path

import numpy as np

STRD_DIR = Path(__file__).resolve().parents[2] / ".." / "shared" / "reference" / "nist-strd"
_RANGE = r"\(lines\s+(\d+)\s+to\s+(\d+)\)"


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


def read_case(name: str) -> StrdCase:
    """Parse ``<name>.dat``: certified block, data block and model equation."""
    lines = (STRD_DIR / f"{name}.dat").read_text().splitlines()
    text = "\n".join(lines)
    c0, c1 = map(int, re.search(r"Certified Values\s+" + _RANGE, text).groups())
    d0, d1 = map(int, re.search(r"Data\s+" + _RANGE, text).groups())
    equation = next(line.strip() for line in lines[:c0] if line.strip().startswith("y ="))
    beta, beta_sd, residual_sd = [], [], math.nan
    certified = lines[c0 - 1:c1]
    for i, line in enumerate(certified):
        match = re.match(r"\s*B(\d+)\s+(\S+)\s+(\S+)", line)
        if match:
            beta.append(float(match.group(2)))
            beta_sd.append(float(match.group(3)))
            continue
        sd = re.match(r"\s*Standard Deviation\s+(\S+)\s*$", line)
        if sd and i > 0 and "Residual" in certified[i - 1]:
            residual_sd = float(sd.group(1))
    columns = lines[d0 - 2].split(":", 1)[1].split()
    rows = [lines[k].split() for k in range(d0 - 1, d1)]
    predictors = [c for c in columns if c != "y"]
    terms = ["1"] if re.search(r"\bB0\b", equation) else []
    if len(predictors) == 1:
        powers = [int(p) for p in re.findall(r"x\*\*(\d+)", equation)]
        degree = max(powers) if powers else 1
        terms += ["x"] + [f"x^{k}" for k in range(2, degree + 1)]
    else:
        terms += predictors
    if len(terms) != len(beta):
        raise ValueError(f"{name}: {len(terms)} terms for {len(beta)} certified parameters")
    return StrdCase(name, columns, rows, terms, np.array(beta), np.array(beta_sd), residual_sd)


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
