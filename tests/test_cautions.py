"""The one wording of the cautions shared by the digest and the history pages."""

from __future__ import annotations

import pytest

from monitor.cautions import cautions


def test_five_cautions_in_order_aid_noise_no_cause_no_advice_firm_decides() -> None:
    said = [c.lower() for c in cautions(0.95, where="pages")]
    assert len(said) == 5
    assert "monitoring aid" in said[0] and "decides nothing" in said[0]
    assert "noisy" in said[1] and "95 % band" in said[1]
    assert "not say why" in said[2] and "how large" in said[2]
    assert said[3] == "nothing on these pages is investment advice or a recommendation to trade."
    assert "risk policy" in said[4] and "licensed professionals" in said[4]


def test_where_changes_only_the_advice_caution() -> None:
    pages = cautions(0.9, where="pages")
    digest = cautions(0.9, where="digest")
    differ = [i for i, (p, d) in enumerate(zip(pages, digest, strict=True)) if p != d]
    assert differ == [3]
    assert digest[3].startswith("Nothing in this digest is investment advice")


def test_band_sentence_is_appended_to_the_noise_caution_only() -> None:
    plain = cautions(0.99, where="digest")
    banded = cautions(0.99, where="digest", band="  Around zero the band is \u00b10.25. ")
    assert "99 % band" in plain[1]
    assert banded[1] == plain[1] + " Around zero the band is \u00b10.25."
    assert banded[:1] + banded[2:] == plain[:1] + plain[2:]


@pytest.mark.parametrize(
    ("level", "where"), [(0.95, "email"), (0.95, ""), (1.0, "pages"), (0.0, "digest"),
                         (float("nan"), "pages")],
)
def test_unknown_document_or_level_outside_zero_one_is_refused(level: float, where: str) -> None:
    with pytest.raises(ValueError, match="cautions"):
        cautions(level, where=where)
