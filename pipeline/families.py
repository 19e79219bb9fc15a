"""The outcome families fairgauge fits, in one table: adding a family is one entry here (and its
estimator, likelihood and tests; DEVELOPERS.md, "How to add a measure").

Each entry says what kind of outcome the family models, the case-mix model and its effect ratio
in words, the shrinkage fit's likelihood, the null distribution of the funnel plot, and whether
the outcome counts patients with an event (then values are rates shown as percentages, and the
small-count rule applies) or measures an amount per patient (shown in the measure's unit).
"""

from __future__ import annotations

from dataclasses import dataclass


@dataclass(frozen=True)
class Family:
    name: str
    outcome_type: str  # the measure type it serves: "binary" or "continuous"
    model_words: str  # the case-mix model, for the model report
    ratio_word: str  # what exp(coefficient) means
    likelihood: str  # of the shrinkage fit (shrinkage.model.LIKELIHOODS)
    funnel_null: str  # null distribution of a unit's O/E (website.funnel.NULLS)
    counts_events: bool  # rates of patients with an event (percent; small-count rule)


# The first family of each outcome type is that type's default.
FAMILIES: dict[str, Family] = {
    f.name: f
    for f in (
        Family(
            "logistic",
            "binary",
            "logistic regression (binomial, logit link)",
            "odds ratio",
            "binomial",
            "binomial",
            True,
        ),
        Family(
            "gamma",
            "continuous",
            "Gamma GLM with log link",
            "ratio of means",
            "gamma",
            "gamma",
            False,
        ),
        Family(
            "lognormal",
            "continuous",
            "least squares on log(outcome), Duan's smearing back to the outcome's scale",
            "ratio of geometric means",
            "lognormal",
            "gamma",
            False,
        ),
    )
}
OUTCOME_TYPES: dict[str, tuple[str, ...]] = {
    kind: tuple(f.name for f in FAMILIES.values() if f.outcome_type == kind)
    for kind in dict.fromkeys(f.outcome_type for f in FAMILIES.values())
}


def default_family(outcome_type: str) -> Family:
    """The family a measure of ``outcome_type`` gets when its config names none."""
    return FAMILIES[OUTCOME_TYPES[outcome_type][0]]
