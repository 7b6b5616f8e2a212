"""Names for the array shapes and option words that travel between modules."""

from __future__ import annotations

from typing import Literal

import numpy as np
import numpy.typing as npt

Float1D = npt.NDArray[np.float64]
"""One value per day (T,) or per pair (P,)."""
Returns2D = npt.NDArray[np.float64]
"""Returns, days x instruments (T, N); NaN marks a missing return."""
CorrMatrix = npt.NDArray[np.float64]
"""One day's correlation matrix (N, N), or a tile of it (I, J)."""
Counts = npt.NDArray[np.float64]
"""Observation counts (n) or Kish effective counts (n_eff), same shape as the values."""

ReturnKind = Literal["log", "simple"]
SmtpSecurity = Literal["starttls", "tls", "none"]
ComputeEngine = Literal["local", "dask"]
Severity = Literal["info", "warning", "critical"]
