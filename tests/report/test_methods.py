"""The methods text: every model part and transfer method describes itself and cites its
sources, and the text names only what ran, each reference once."""

from __future__ import annotations

import pytest

from regional.models import DegreeDaySnow, get_model, model_names
from regional.report.methods import methods_text
from regional.transfer import TRANSFER_METHODS

PARTS = [get_model(name) for name in model_names()] + [DegreeDaySnow()]


@pytest.mark.parametrize("part", PARTS + list(TRANSFER_METHODS.values()), ids=repr)
def test_every_model_and_method_carries_a_description_and_references(part):
    assert isinstance(part.description, str) and len(part.description) > 40
    assert part.references
    for reference in part.references:
        assert any(str(year) in reference for year in range(1900, 2100)), reference


def test_text_names_only_the_parts_that_ran():
    text = methods_text(
        ["gr4j"],
        ["calibrated", "median", "proximity"],
        snow=True,
        objective="nse",
        screening=False,
    )
    headings = [heading for heading, _ in text.paragraphs]
    assert headings[:4] == [
        "Storage model gr4j",
        "Snow store",
        "Transfer method median",
        "Transfer method proximity",
    ]
    assert "Screening" not in headings
    body = " ".join(paragraph for _, paragraph in text.paragraphs)
    assert "objective (nse)" in body
    assert not any("Linear reservoir" in p for _, p in text.paragraphs)
    assert any(r.startswith("Martinec") for r in text.references)


def test_references_listed_once_and_sorted():
    text = methods_text(
        ["linear", "gr4j"],
        ["regression", "similarity", "proximity", "median"],
        snow=False,
        objective="kge",
        screening=True,
    )
    assert len(text.references) == len(set(text.references))
    assert list(text.references) == sorted(text.references, key=str.casefold)
    assert sum("Oudin" in r for r in text.references) == 1
    assert not any(r.startswith("Martinec") for r in text.references)
