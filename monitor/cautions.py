"""The one wording of the cautions printed at the foot of the digest and the history pages.

This module owns the five things every reader is told, in the order shown: what comove is
for, that every correlation is a noisy estimate to be read with its band, what correlation
does and does not describe, that nothing is investment advice, and who decides limits and
hedges. The digest and the pages call :func:`cautions` so the two never drift apart; the
only differences are the noun naming the document and an optional sentence with band
widths (the digest states them, the pages show a band beside every value instead).
"""

from __future__ import annotations

import math

_NOT_ADVICE: dict[str, str] = {
    "digest": "Nothing in this digest",
    "pages": "Nothing on these pages",
}
"""How the investment-advice caution names each document ("this pages" would not read)."""


def cautions(confidence_level: float, *, where: str, band: str = "") -> tuple[str, ...]:
    """The five cautions, in the order shown.

    Parameters
    ----------
    confidence_level : float
        Level of the bands shown beside every correlation, in (0, 1), e.g. 0.95; printed
        as a percentage ("95 %").
    where : {"digest", "pages"}
        Which document the cautions close; used only in the investment-advice caution.
    band : str, optional
        A sentence appended to the noise caution (the digest passes its band widths
        around zero). Surrounding whitespace is dropped; empty adds nothing.

    Returns
    -------
    tuple of str, length 5
        One caution per entry, each a complete sentence or two, no markup.

    Raises
    ------
    ValueError
        If `where` is not "digest" or "pages", or `confidence_level` is not in (0, 1)
        (a programming error: the configuration is validated before any rendering).
    """
    if where not in _NOT_ADVICE:
        raise ValueError(f"cautions: where must be 'digest' or 'pages', not {where!r}")
    if not (math.isfinite(confidence_level) and 0.0 < confidence_level < 1.0):
        raise ValueError(f"cautions: confidence_level must be in (0, 1), not {confidence_level}")
    percent = f"{100 * confidence_level:g} %"
    noise = (
        "Every correlation here is an estimate from a limited number of days and is "
        f"noisy. Read each value together with its {percent} band; a band that is wide "
        "means the value says little."
    )
    extra = band.strip()
    if extra:
        noise = f"{noise} {extra}"
    return (
        "comove is a monitoring aid: it points at pairs that may deserve a closer look "
        "and decides nothing.",
        noise,
        "Correlation describes how consistently two instruments moved in the same "
        "direction. It does not say why they moved, nor how large the moves were.",
        f"{_NOT_ADVICE[where]} is investment advice or a recommendation to trade.",
        "Limits, hedges and any action are decided under the firm's own risk policy by "
        "its licensed professionals.",
    )
