"""The promotion decision as a pure function of its context (our own policy:
lower primary holdout metric wins, within a 1 % tolerance; no outside source)."""

from __future__ import annotations

from service.versions.decide import Promotion, PromotionContext, decide

SPEC = {"task": "binary", "promotion": "auto"}


def holdout(log_loss: float) -> dict[str, dict[str, float]]:
    return {"holdout": {"log_loss": log_loss}}


def test_a_manual_model_is_never_promoted_whatever_the_figures() -> None:
    manual = {**SPEC, "promotion": "manual"}
    assert decide(PromotionContext(manual, holdout(0.1), None, None)) is None
    assert decide(PromotionContext(manual, holdout(0.1), 7, holdout(0.9))) is None


def test_the_first_version_is_promoted_over_nothing() -> None:
    assert decide(PromotionContext(SPEC, holdout(0.6), None, None)) == Promotion(over=None)


def test_a_version_at_least_as_good_within_the_tolerance_is_promoted_over_the_active_one() -> None:
    assert decide(PromotionContext(SPEC, holdout(0.50), 3, holdout(0.50))) == Promotion(over=3)
    assert decide(PromotionContext(SPEC, holdout(0.5049), 3, holdout(0.50))) == Promotion(over=3)
    promotion = decide(PromotionContext(SPEC, holdout(0.5049), 3, holdout(0.50)))
    assert promotion is not None
    assert promotion.figures == {"metric": "log_loss", "new": 0.5049, "active": 0.50}
    assert decide(PromotionContext(SPEC, holdout(0.52), 3, holdout(0.50))) is None


def test_a_version_without_a_figure_never_replaces_one_with_a_figure() -> None:
    assert decide(PromotionContext(SPEC, {"holdout": {}}, 3, holdout(0.5))) is None
    assert decide(PromotionContext(SPEC, {"holdout": {}}, 3, {"holdout": {}})) == Promotion(3)
