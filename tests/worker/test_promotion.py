"""Promotion: the policy, and the pointer moves of ``promote``.

The policy values below are Keelson's own design (docs/architecture.md, data
flow, "Promotion": at least as good within a tolerance), not an outside source.
"""

from __future__ import annotations

from sqlalchemy import select

from service.store.database import make_engine, make_sessionmaker
from service.store.tables import ModelRow, TrainerRow, VersionRow
from service.versions.policy import RELATIVE_TOLERANCE, should_promote
from service.versions.promote import promote
from tests.worker.factories import create_model, create_version

BINARY = {"task": "binary"}
REGRESSION = {"task": "regression"}


def holdout(**metrics: float) -> dict[str, dict[str, float]]:
    return {"holdout": dict(metrics), "prequential": {}}


def test_a_lower_log_loss_is_promoted_and_a_clearly_higher_one_is_not() -> None:
    assert should_promote(BINARY, holdout(log_loss=0.30), holdout(log_loss=0.40))
    assert not should_promote(BINARY, holdout(log_loss=0.50), holdout(log_loss=0.40))


def test_a_metric_worse_by_less_than_the_tolerance_still_counts_as_as_good() -> None:
    active = 0.40
    inside = active * (1 + RELATIVE_TOLERANCE / 2)
    outside = active * (1 + RELATIVE_TOLERANCE * 2)
    assert should_promote(BINARY, holdout(log_loss=inside), holdout(log_loss=active))
    assert not should_promote(BINARY, holdout(log_loss=outside), holdout(log_loss=active))


def test_regression_is_judged_on_rmse_not_on_other_metrics() -> None:
    assert should_promote(REGRESSION, holdout(rmse=1.0, r2=0.1), holdout(rmse=2.0, r2=0.9))
    assert not should_promote(REGRESSION, holdout(rmse=3.0, r2=0.99), holdout(rmse=2.0, r2=0.1))


def test_without_an_active_metric_the_new_version_wins_unless_it_is_non_finite() -> None:
    assert should_promote(BINARY, holdout(log_loss=9.0), None)
    assert should_promote(BINARY, {"holdout": {}}, None)
    assert should_promote(BINARY, holdout(log_loss=9.0), {"holdout": {}})
    assert not should_promote(BINARY, holdout(log_loss=float("nan")), None)
    assert not should_promote(BINARY, {"holdout": {}}, holdout(log_loss=0.4))


def test_promote_retires_the_old_active_version_and_moves_the_pointer(database_url: str) -> None:
    engine = make_engine(database_url)
    with make_sessionmaker(engine, write=True)() as session, session.begin():
        model = create_model(session)
        first = create_version(session, model, 1, cursor=10)
        promote(session, model, first)
        second = create_version(session, model, 2, parent=first, cursor=20)
        session.get(TrainerRow, model.id).head_version_id = second.id  # type: ignore[union-attr]
        promote(session, model, second)
    with make_sessionmaker(engine)() as session:
        statuses = dict(session.execute(select(VersionRow.number, VersionRow.status)).all())
        assert statuses == {1: "retired", 2: "active"}
        stored = session.get(ModelRow, model.id)
        assert stored is not None and stored.active_version_id == second.id
        assert session.get(VersionRow, second.id).promoted_at is not None  # type: ignore[union-attr]
    engine.dispose()


def test_rolling_back_to_an_ancestor_leaves_the_online_head_alone(database_url: str) -> None:
    engine = make_engine(database_url)
    with make_sessionmaker(engine, write=True)() as session, session.begin():
        model = create_model(session)
        v1 = create_version(session, model, 1, cursor=10)
        v2 = create_version(session, model, 2, parent=v1, cursor=20)
        v3 = create_version(session, model, 3, parent=v2, cursor=30, status="active")
        model.active_version_id = v3.id
        trainer = session.get(TrainerRow, model.id)
        assert trainer is not None
        trainer.head_version_id, trainer.cursor = v3.id, 30
        promote(session, model, v1)
    with make_sessionmaker(engine)() as session:
        trainer = session.get(TrainerRow, model.id)
        assert trainer is not None and (trainer.head_version_id, trainer.cursor) == (v3.id, 30)
        assert session.get(ModelRow, model.id).active_version_id == v1.id  # type: ignore[union-attr]
    engine.dispose()


def test_a_promoted_retrain_becomes_the_online_head_and_clears_a_stopped_lineage(
    database_url: str,
) -> None:
    engine = make_engine(database_url)
    with make_sessionmaker(engine, write=True)() as session, session.begin():
        model = create_model(session)
        online = create_version(session, model, 1, cursor=50)
        trainer = session.get(TrainerRow, model.id)
        assert trainer is not None
        trainer.head_version_id, trainer.cursor = online.id, 50
        trainer.error = "NonFiniteError: loss is nan"
        retrain = create_version(session, model, 2, origin="retrain", cursor=40)
        promote(session, model, retrain)
    with make_sessionmaker(engine)() as session:
        trainer = session.get(TrainerRow, model.id)
        assert trainer is not None
        assert (trainer.head_version_id, trainer.cursor, trainer.error) == (retrain.id, 40, None)
    engine.dispose()
