"""Observability report: rank test against the textbook observability matrix."""

from __future__ import annotations

from typing import Any

import numpy as np
import pytest

from estimator.config import load_train_config, parse_train_config
from estimator.model import TrainModel
from estimator.observability import observability_report, observable_subspace
from tests.estimator.trains import train_document

DEMO = "replay_data/wrenfield/train.toml"


def model_with(measured: list[tuple[str, str]], **spec: Any) -> TrainModel:
    doc = train_document(**spec)
    doc["measurements"] = [
        {
            "tag": f"AT-{vessel}-{species}",
            "species": species,
            "location": vessel,
            "std": "5 mol/m^3",
        }
        for vessel, species in measured
    ]
    return TrainModel.from_config(parse_train_config(doc))


def test_rank_matches_kalman_observability_matrix_on_small_systems():
    # Kalman's criterion: rank [H; HF; ...; HF^(n-1)] (Kailath, Linear Systems, 1980,
    # sec. 2.3), computed directly where n is small enough for powers to be safe,
    # with a rank tolerance relative to the largest singular value. Half of the
    # systems are unobservable by construction: in rotated coordinates the measured
    # half evolves on its own, so the true rank is n // 2.
    rng = np.random.default_rng(1)
    for _ in range(200):
        n = int(rng.integers(2, 6))
        f = rng.standard_normal((n, n))
        expected = n
        if rng.random() < 0.5:
            expected = n // 2
            t = np.linalg.qr(rng.standard_normal((n, n)))[0]
            block = rng.standard_normal((n, n))
            block[: n // 2, n // 2 :] = 0.0
            f = t @ block @ t.T
            h = np.hstack([rng.standard_normal((1, n // 2)), np.zeros((1, n - n // 2))]) @ t.T
        else:
            h = rng.standard_normal((1, n))
        obs = np.vstack([h @ np.linalg.matrix_power(f, k) for k in range(n)])
        sv = np.linalg.svd(obs, compute_uv=False)
        assert np.count_nonzero(sv > 1e-9 * sv[0]) == expected
        assert observable_subspace(f, h).shape[1] == expected


def test_demo_train_is_fully_observable():
    report = observability_report(TrainModel.from_config(load_train_config(DEMO)))
    assert report.observable
    assert report.unobservable == ()
    assert "all 8 states are observable" in report.message()


def test_product_unseen_by_a_reactant_analyzer_is_named_with_what_to_measure():
    # Irreversible A -> B: B never acts back on A, so an analyzer that sees only A
    # cannot tell B in any vessel; measuring B downstream fixes all of it.
    model = model_with([("R-3", "A")], volumes=("2 m^3", "1 m^3", "3 m^3"))
    report = observability_report(model)
    assert not report.observable
    assert report.unobservable == ("R-1.B", "R-2.B", "R-3.B")
    assert report.suggestions[0] == "B in R-3"
    assert "cannot estimate: R-1.B, R-2.B, R-3.B" in report.message()


def test_intermediate_vessels_observable_from_last_vessel_alone():
    # The cascade is a chain: the last vessel's balance carries the one before it,
    # so one product analyzer seeing both species determines every vessel.
    model = model_with([("R-4", "A"), ("R-4", "B")], volumes=("2 m^3", "1 m^3", "3 m^3", "1 m^3"))
    assert observability_report(model).observable


@pytest.mark.parametrize(
    ("measured", "observable"),
    [
        ([("R-2", "A"), ("R-2", "B")], True),  # the conserved total pins the feed, hence the bias
        ([], False),  # the feed analyzer alone cannot tell its bias from the feed
    ],
)
def test_inlet_analyzer_bias_needs_the_conserved_total(measured, observable):
    model = model_with(
        measured,
        volumes=("2 m^3", "1 m^3"),
        feed_model="state",
        bias=("A",),
        estimate_activity=True,
    )
    report = observability_report(model)
    assert report.observable is observable
    if not observable:
        assert "bias.AI-0" in report.unobservable
        assert "feed.A" in report.unobservable
