"""Identification report (issue 12 item 3) and degenerate data (issue 22 item 5): parameters
the data do not identify are named with the reason, held fixed or given no standard error;
degenerate data are refused or get no precise-looking standard errors."""

from __future__ import annotations

import json

import jax
import jax.numpy as jnp
import numpy as np
import pandas as pd
import pytest

import stopwise
from stopwise import cli
from stopwise.data_schemas.errors import StopwiseInputError
from stopwise.models.base import Model, ParamSpec
from stopwise.models.spec import build_model

COLUMNS = ["subject", "trial", "step", "p_survive", "gain", "action", "outcome"]


def trial_rows(subject: str, trial: int, p: float, stop_at: int | None = None, bust_at=None):
    """One trial: draws that succeed, then a stop at ``stop_at`` or a bust at ``bust_at``."""
    last = stop_at if stop_at is not None else bust_at
    rows = [(subject, trial, s, p, 1.0, "draw", "success") for s in range(last)]
    end = ("stop", None) if stop_at is not None else ("draw", "bust")
    return [*rows, (subject, trial, last, p, 1.0, *end)]


def frame(rows) -> pd.DataFrame:
    return pd.DataFrame(rows, columns=COLUMNS)


def varied_subject(label: str, seed: int) -> list[tuple]:
    rng = np.random.default_rng(seed)
    return [
        r
        for t in range(8)
        for r in trial_rows(label, t, (0.7, 0.9)[t % 2], stop_at=int(rng.integers(0, 5)))
    ]


@pytest.fixture(scope="module")
def gains_only_price_list() -> pd.DataFrame:
    """A gains-only price list (every outcome above zero), choices simulated by crra+logit."""
    rows = [
        {
            "subject": f"p{s}",
            "item": i + 1,
            **{"a_x1": 20, "a_p1": p, "a_x2": 16, "a_p2": 1 - p},
            **{"b_x1": 38, "b_p1": p, "b_x2": 1, "b_p2": 1 - p},
        }
        for s in range(20)
        for i, p in enumerate(np.round(np.arange(0.1, 1.01, 0.1), 2))
    ]
    design = pd.DataFrame(rows)
    model = build_model("crra+logit")
    return model.simulate({"r": 0.5, "precision": 0.3}, design, jax.random.PRNGKey(0))


def test_gains_only_price_list_names_the_loss_parameters(gains_only_price_list) -> None:
    fit = stopwise.fit("pt+tk+probit", gains_only_price_list)
    report = fit.identification
    assert set(report.unidentified) == {"beta", "loss_aversion", "delta"}
    assert all("no losses" in why for why in report.unidentified.values())
    assert set(report.fixed) == {"beta", "loss_aversion", "delta"}
    # What is identified gets standard errors (not NaN for everything).
    assert list(fit.params.index) == ["alpha", "gamma", "sigma"]
    assert np.all(np.isfinite(fit.params["se"])) and np.all(fit.params["se"] > 0)
    payload = json.loads(fit.to_json())["identification"]
    assert {u["name"] for u in payload["unidentified"]} == {"beta", "loss_aversion", "delta"}
    assert "Identification: partly identified" in fit.summary()
    # The claim itself, checked directly: with no losses the log-likelihood does not move
    # when the loss parameters do (common practice, no source).
    data, _ = stopwise.api.resolve_data(gains_only_price_list)
    model = build_model("pt+tk+probit")
    theta = {**model.start_theta(), "alpha": 0.7}
    base = float(jnp.sum(model.loglik_obs(theta, data)))
    moved = {**theta, "beta": 1.9, "loss_aversion": 4.0, "delta": 1.6}
    assert float(jnp.sum(model.loglik_obs(moved, data))) == pytest.approx(base, abs=1e-12)
    assert float(jnp.sum(model.loglik_obs({**theta, "alpha": 0.9}, data))) != pytest.approx(base)


def test_stopping_data_without_losses_name_tk_delta() -> None:
    data = frame([r for s in range(8) for r in varied_subject(f"s{s}", s)])
    fit = stopwise.fit("crra+tk+myopic+logit", data, se="hessian")
    assert set(fit.identification.unidentified) == {"delta"}
    assert "delta" not in fit.params.index and fit.identification.fixed == {"delta": 0.7}


def _sum_loglik(theta, data):
    """P(draw) = sigmoid(b1 + b2 + c * step): only b1 + b2 enters."""
    x = theta["b1"] + theta["b2"] + theta["c"] * data.step
    return jnp.where(data.draw > 0, jax.nn.log_sigmoid(x), jax.nn.log_sigmoid(-x))


def test_a_flat_ridge_is_named_and_only_its_parameters_lose_their_se() -> None:
    ridge = Model(
        name="sum-of-two",
        data_kind="stopping",
        params=(ParamSpec("b1", start=0.0), ParamSpec("b2", start=0.5), ParamSpec("c", start=0.0)),
        loglik_obs=_sum_loglik,
        simulate=lambda t, d, k: None,
    )
    data = frame([r for s in range(8) for r in varied_subject(f"s{s}", s)])
    fit = stopwise.fit(ridge, data, se="hessian")
    report = fit.identification
    # Only b1 + b2 enters the likelihood, so (1, -1, 0) is a flat direction (fact of the
    # model's algebra, common practice, no source).
    assert set(report.unidentified) == {"b1", "b2"}
    assert "shared with b2" in report.unidentified["b1"]
    assert np.isnan(fit.params.loc["b1", "se"]) and np.isnan(fit.params.loc["b2", "se"])
    assert np.isfinite(fit.params.loc["c", "se"])
    assert fit.identification.smallest_relative_eigenvalue < 1e-9
    # Independent computation: holding b2 fixed removes the ridge (b1 absorbs the sum), and
    # that fit's ordinary Hessian standard error of c must equal the pseudo-inverse one.
    reduced = stopwise.fit(ridge, data, se="hessian", fixed={"b2": 0.5})
    assert reduced.identification.status == "identified"
    np.testing.assert_allclose(
        fit.params.loc["c", "estimate"], reduced.params.loc["c", "estimate"], rtol=1e-6
    )
    np.testing.assert_allclose(fit.params.loc["c", "se"], reduced.params.loc["c", "se"], rtol=1e-5)


def test_everyone_stopping_at_step_zero_is_refused() -> None:
    data = frame([r for s in range(6) for t in range(5) for r in trial_rows(f"s{s}", t, 0.8, 0)])
    with pytest.raises(StopwiseInputError, match=r"is 'stop'.*perfect prediction"):
        stopwise.fit("crra+myopic+logit", data)


def test_everyone_drawing_until_bust_is_refused(tmp_path) -> None:
    rows = [
        r
        for s in range(6)
        for t in range(5)
        for r in trial_rows(f"s{s}", t, 0.8, bust_at=(s + t) % 4)
    ]
    path = tmp_path / "busts.csv"
    frame(rows).to_csv(path, index=False)
    out = tmp_path / "fit.json"
    assert cli.main(["fit", str(path), "--model", "crra+myopic+logit", "--json", str(out)]) == 2
    assert not out.exists()


def test_one_condition_all_stopping_at_three_gets_no_standard_errors() -> None:
    data = frame([r for s in range(6) for t in range(5) for r in trial_rows(f"s{s}", t, 0.8, 3)])
    fit = stopwise.fit("crra+myopic+logit", data)
    assert fit.identification.perfect_prediction
    assert fit.params["se"].isna().all() and fit.params["ci_low"].isna().all()
    assert any("perfect prediction" in w for w in fit.warnings)


def test_a_single_three_decision_trial_gets_no_standard_errors() -> None:
    fit = stopwise.fit("crra+myopic+logit", frame(trial_rows("s0", 0, 0.8, stop_at=2)))
    assert fit.params["se"].isna().all()
    assert "not identified" in fit.identification.status


@pytest.mark.parametrize("copies", [2, 4])
def test_identical_subjects_get_no_clustered_standard_errors(copies: int) -> None:
    one = varied_subject("a", 0)
    rows = [(f"s{c}", *r[1:]) for c in range(copies) for r in one]
    fit = stopwise.fit("crra+myopic+logit", frame(rows), se="robust")
    assert fit.params["se"].isna().all()
    assert any("clustered sandwich" in w and "standard errors are NaN" in w for w in fit.warnings)
    # the Hessian standard errors of the same fit stay available and finite
    hess = stopwise.fit("crra+myopic+logit", frame(rows), se="hessian")
    assert np.all(np.isfinite(hess.params["se"]))


def test_well_identified_fit_says_so() -> None:
    data = frame([r for s in range(8) for r in varied_subject(f"s{s}", s)])
    fit = stopwise.fit("crra+myopic+logit", data, se="hessian")
    assert fit.identification.status == "identified" and not fit.identification.unidentified
    assert "every parameter identified" in fit.summary()


def test_hessian_directions_flat_and_downward() -> None:
    from stopwise.estimation.ml.identification import direction_reason, null_directions

    # diag(4, 0, -2): eigenvalues relative to the largest |.| are 1, 0 and -0.5 (arithmetic).
    smallest, found = null_directions(np.diag([4.0, 0.0, -2.0]))
    assert smallest == pytest.approx(-0.5)
    assert sorted(round(r, 6) for r, _ in found) == [-0.5, 0.0]
    assert "no maximum" in direction_reason(-0.5, [], False)
    assert "flat direction" in direction_reason(0.0, ["r"], False)
