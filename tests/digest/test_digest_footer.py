"""The digest's footer: the shared cautions (monitor.cautions) plus its band-width sentence."""

from __future__ import annotations

from monitor.cautions import cautions as shared_cautions
from monitor.digest.context import DigestParameters
from monitor.digest.footer import band_sentence, cautions


def test_digest_footer_is_the_shared_wording_with_the_band_sentence_in_the_noise_caution(
) -> None:
    parameters = DigestParameters(("rolling:63", "ewma:hl=21"), (63.0, 41.0), "log",
                                  confidence_level=0.9)
    said = cautions(parameters)
    plain = shared_cautions(0.9, where="digest")
    assert len(said) == 5
    assert said[:1] + said[2:] == plain[:1] + plain[2:]
    assert said[1] == f"{plain[1]} {band_sentence(parameters)}"
    assert "90 % band" in said[1] and "rolling:63 (about 63 observations)" in said[1]
    assert said[3].startswith("Nothing in this digest is investment advice")


def test_no_band_sentence_when_no_measure_has_more_than_three_observations() -> None:
    parameters = DigestParameters(("rolling:3",), (3.0,), "simple")
    assert band_sentence(parameters) == ""
    assert cautions(parameters) == shared_cautions(0.95, where="digest")
