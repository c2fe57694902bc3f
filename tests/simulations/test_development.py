import numpy as np
import pandas as pd
import pytest
import torch
from sklearn.linear_model import LogisticRegression
from sklearn.metrics import roc_auc_score

from simulations.dataset import load_public_dataset
from simulations.development import develop_model
from simulations.scenario import default_scenario
from simulations.sites import build_sites, development_split
from site_agent.exceptions import InputError
from site_agent.training.model_bundle import bundle_bytes, load_bundle

SCENARIO = default_scenario()
SITES = build_sites(SCENARIO, load_public_dataset())
TRAIN, HELD_OUT = development_split(SITES[SCENARIO.development_index], 0.3, SCENARIO.seed)


def test_logistic_model_matches_sklearn_with_the_same_l2_penalty() -> None:
    """Our L-BFGS logistic fit equals scikit-learn's LogisticRegression at the equivalent C."""
    weight_decay = 1e-2
    model, manifest = develop_model(TRAIN, "logistic", seed=0, weight_decay=weight_decay)
    x = (TRAIN[list(manifest.feature_names)].to_numpy() - manifest.feature_means) / np.array(
        manifest.feature_sds
    )
    # Our loss is mean log-loss + wd * ||w||^2; sklearn minimises 0.5 ||w||^2 + C * sum log-loss,
    # which has the same minimiser when C = 1 / (2 * wd * n) (scikit-learn 1.9 user guide,
    # "Logistic regression", L2 penalty; intercept unpenalised in both).
    reference = LogisticRegression(C=1 / (2 * weight_decay * len(x)), tol=1e-10, max_iter=10_000)
    reference.fit(x, TRAIN["label"].to_numpy())
    bundle = load_bundle(bundle_bytes(model, manifest))
    np.testing.assert_allclose(bundle.predict(TRAIN), reference.predict_proba(x)[:, 1], atol=2e-3)


def test_same_seed_gives_identical_weights_and_different_seed_differs() -> None:
    """Training is deterministic by seed (mlp, whose start point matters)."""
    first = develop_model(TRAIN, "mlp", seed=5).model.state_dict()
    again = develop_model(TRAIN, "mlp", seed=5).model.state_dict()
    other = develop_model(TRAIN, "mlp", seed=6).model.state_dict()
    assert all(torch.equal(first[k], again[k]) for k in first)
    assert not all(torch.equal(first[k], other[k]) for k in first)


def test_training_leaves_the_callers_torch_random_state_alone() -> None:
    """develop_model forks torch's generator, so the caller's random stream is unchanged."""
    torch.manual_seed(123)
    expected = torch.rand(3)
    torch.manual_seed(123)
    develop_model(TRAIN, "mlp", seed=1)
    assert torch.equal(torch.rand(3), expected)


def test_manifest_records_features_standardisation_and_training_summary() -> None:
    """The manifest holds the training means and SDs, feature order and a training summary."""
    _, manifest = develop_model(TRAIN, "mlp", seed=0, hidden_width=8, site="Northgate General")
    features = list(manifest.feature_names)
    assert features == [c for c in TRAIN.columns if c.startswith("feature_")]
    np.testing.assert_allclose(manifest.feature_means, TRAIN[features].mean())
    np.testing.assert_allclose(manifest.feature_sds, TRAIN[features].std(ddof=1))
    assert manifest.hidden_width == 8 and manifest.training is not None
    assert manifest.training.n_cases == len(TRAIN)
    assert manifest.training.n_positive == int(TRAIN["label"].sum())
    assert manifest.training.site == "Northgate General"


@pytest.mark.parametrize("architecture", ["logistic", "mlp"])
def test_default_scenario_auc_is_high_at_development_and_lower_at_most_shifted_site(
    architecture: str,
) -> None:
    """Held-out AUC at the development site is >= 0.95 and well above the most shifted site's."""
    model, manifest = develop_model(TRAIN, architecture, seed=SCENARIO.seed)
    bundle = load_bundle(bundle_bytes(model, manifest))
    # AUC by scikit-learn's roc_auc_score (reference implementation).
    development_auc = roc_auc_score(HELD_OUT["label"], bundle.predict(HELD_OUT))
    most_shifted = SITES[-1]  # Lowmoor: strongest noise, smoothing and size shift
    shifted_auc = roc_auc_score(most_shifted.table["label"], bundle.predict(most_shifted.table))
    assert development_auc >= 0.95
    assert shifted_auc < development_auc - 0.05


@pytest.mark.parametrize(
    ("frame", "message"),
    [
        (pd.DataFrame({"label": [0, 1]}), "no feature_<name> columns"),
        (pd.DataFrame({"feature_a": [1.0, 2.0]}), "no 'label' column"),
        (pd.DataFrame({"label": [1, 1], "feature_a": [1.0, 2.0]}), "both classes"),
    ],
)
def test_invalid_training_frame_raises_input_error(frame: pd.DataFrame, message: str) -> None:
    """A frame without features, labels or both classes is refused."""
    with pytest.raises(InputError, match=message):
        develop_model(frame)
