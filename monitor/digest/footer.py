"""The digest's footer cautions and the noise band they quote.

The cautions are the program's one wording (`monitor.cautions`), shared word for word by
the HTML and the text part; the digest adds to the second one how wide the Fisher z band
(`monitor.engine.bands.fisher_band`) is around zero for each measure's observation count.
"""

from __future__ import annotations

import math

import numpy as np

from monitor.cautions import cautions as shared_cautions
from monitor.digest.context import DigestParameters
from monitor.engine.bands import fisher_band
from monitor.templating import format_corr


def noise_band(r: float, n: float, confidence: float) -> tuple[float, float]:
    """Fisher z confidence band of a correlation, for the footer's caution.

    Parameters
    ----------
    r : float
        Correlation in (-1, 1).
    n : float
        Observations (or effective observations); at most 3 gives (NaN, NaN).
    confidence : float
        Two-sided level, e.g. 0.95.

    Returns
    -------
    (low, high) : tuple of float
        tanh(atanh(r) -+ q / sqrt(n - 3)) with q the normal quantile.
    """
    low, high = fisher_band(np.array([r]), np.array([n]), confidence)
    return (float(low[0]), float(high[0]))


def band_sentence(parameters: DigestParameters) -> str:
    """The digest's sentence on band widths, appended to the shared noise caution.

    States, per measure, the half-width of the `noise_band` around a true value of zero
    for the measure's typical observation count; measures with at most 3 observations
    (no band) are left out, and "" is returned when none is left.
    """
    widths = []
    for measure, n in zip(parameters.measures, parameters.observations, strict=True):
        low, high = noise_band(0.0, n, parameters.confidence_level)
        if math.isfinite(high):
            widths.append(f"{measure} (about {n:.0f} observations): \u00b1{format_corr(high)}")
    if not widths:
        return ""
    return (
        # The shared noise caution has just named the band's level: no need to repeat it.
        "Around a true value of zero, that band is "
        + "; ".join(widths)
        + ". It is wider for fewer observations and narrower near \u00b11."
    )


def cautions(parameters: DigestParameters) -> tuple[str, ...]:
    """The footer's five cautions, shared word for word by the HTML and the text part.

    The wording is `monitor.cautions.cautions` (the same as the history pages'), with the
    digest's `band_sentence` appended to the noise caution.
    """
    return shared_cautions(
        parameters.confidence_level, where="digest", band=band_sentence(parameters)
    )


__all__ = ["band_sentence", "cautions", "noise_band"]
