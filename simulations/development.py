"""Training the model under study at the development site.

The model is fitted to the training part of the development site's table only (see
:func:`simulations.sites.development_split`), with full-batch optimisation on CPU:

``logistic``
    L2-penalised logistic regression fitted by L-BFGS with a strong-Wolfe line search.
``mlp``
    One hidden ReLU layer, trained by Adam with weight decay.

Inputs are standardised with the training part's means and SDs, which the manifest records.
Training is deterministic for a seed: torch's global generator is forked and seeded for the
call (so the caller's random state is untouched) and torch runs on one thread.

References
----------
D.C. Liu, J. Nocedal (1989). On the limited memory BFGS method for large scale optimization.
Mathematical Programming 45:503-528. DOI: 10.1007/BF01589116

D.P. Kingma, J. Ba (2015). Adam: a method for stochastic optimization. ICLR.
arXiv: 1412.6980
"""

from __future__ import annotations

from typing import NamedTuple

import numpy as np
import pandas as pd
import torch

from simulations.dataset import FEATURE_PREFIX
from site_agent.exceptions import InputError
from site_agent.training.model_bundle import (
    DEFAULT_HIDDEN_WIDTH,
    Architecture,
    BundleManifest,
    TrainingSummary,
    build_model,
    single_thread,
    standardise,
)

DEFAULT_WEIGHT_DECAY = 1e-2
LBFGS_ITERATIONS = 200
ADAM_STEPS = 400
ADAM_LEARNING_RATE = 0.01


class DevelopedModel(NamedTuple):
    """A trained model and the manifest that goes into its bundle."""

    model: torch.nn.Module
    manifest: BundleManifest


def develop_model(
    train_frame: pd.DataFrame,
    architecture: Architecture | str = Architecture.LOGISTIC,
    seed: int = 0,
    *,
    hidden_width: int = DEFAULT_HIDDEN_WIDTH,
    weight_decay: float = DEFAULT_WEIGHT_DECAY,
    site: str = "development site",
    name: str | None = None,
) -> DevelopedModel:
    """Train a classifier on ``train_frame`` (``feature_*`` columns and a 0/1 ``label``).

    Parameters
    ----------
    train_frame
        Training cases only.
    architecture
        ``"logistic"`` or ``"mlp"``.
    seed
        Seeds weight initialisation; the same seed gives the same weights.
    hidden_width
        Hidden units of the ``mlp``.
    weight_decay
        L2 penalty on the weights (logistic: on the coefficients, not the intercept).
    site
        Name recorded in the training summary.
    name
        Bundle name; defaults to ``"<architecture>-<n features>f"``.

    Raises
    ------
    InputError
        If the frame has no feature columns, or ``label`` is missing, not 0/1, or one-class.
    """
    arch = Architecture(architecture)
    features = [str(c) for c in train_frame.columns if str(c).startswith(FEATURE_PREFIX)]
    if not features:
        raise InputError(f"training frame has no {FEATURE_PREFIX}<name> columns")
    if "label" not in train_frame.columns:
        raise InputError("training frame has no 'label' column")
    labels = pd.to_numeric(train_frame["label"], errors="coerce")
    if labels.isna().any() or not labels.isin([0, 1]).all() or labels.nunique() < 2:
        raise InputError("training labels must be 0 or 1, with both classes present")
    values = train_frame[features].apply(pd.to_numeric, errors="coerce")
    sds = values.std(axis=0, ddof=1).fillna(1.0)
    provisional = BundleManifest(
        name=name or f"{arch.value}-{len(features)}f",
        architecture=arch,
        hidden_width=hidden_width if arch is Architecture.MLP else None,
        feature_names=tuple(features),
        feature_means=tuple(float(v) for v in values.mean(axis=0)),
        feature_sds=tuple(float(v) for v in sds.where(sds > 0, 1.0)),
    )
    x = standardise(train_frame, provisional)
    y = torch.from_numpy(labels.to_numpy(dtype=np.float32))

    with torch.random.fork_rng(devices=[]), single_thread():
        torch.manual_seed(seed)
        model = build_model(arch, len(features), provisional.hidden_width)
        if arch is Architecture.LOGISTIC:
            loss, iterations, optimizer = _fit_lbfgs(model, x, y, weight_decay)
        else:
            loss, iterations, optimizer = _fit_adam(model, x, y, weight_decay)
    model.eval()
    summary = TrainingSummary(
        site=site,
        n_cases=len(y),
        n_positive=int(y.sum().item()),
        optimizer=optimizer,
        iterations=iterations,
        weight_decay=weight_decay,
        seed=seed,
        final_loss=loss,
    )
    return DevelopedModel(model, provisional.model_copy(update={"training": summary}))


def _penalty(model: torch.nn.Module, weight_decay: float) -> torch.Tensor:
    weights = [p for n, p in model.named_parameters() if n.endswith("weight")]
    return weight_decay * sum((w.pow(2).sum() for w in weights), torch.zeros(()))


def _fit_lbfgs(
    model: torch.nn.Module, x: torch.Tensor, y: torch.Tensor, weight_decay: float
) -> tuple[float, int, str]:
    optimizer = torch.optim.LBFGS(
        model.parameters(), lr=1.0, max_iter=LBFGS_ITERATIONS, line_search_fn="strong_wolfe"
    )
    bce = torch.nn.BCEWithLogitsLoss()

    def closure() -> torch.Tensor:
        optimizer.zero_grad()
        loss: torch.Tensor = bce(model(x), y) + _penalty(model, weight_decay)
        loss.backward()  # type: ignore[no-untyped-call]
        return loss

    optimizer.step(closure)  # type: ignore[no-untyped-call]
    with torch.no_grad():
        final = float(bce(model(x), y))
    state = optimizer.state[next(iter(model.parameters()))]
    return final, int(state.get("n_iter", LBFGS_ITERATIONS)), "L-BFGS"


def _fit_adam(
    model: torch.nn.Module, x: torch.Tensor, y: torch.Tensor, weight_decay: float
) -> tuple[float, int, str]:
    optimizer = torch.optim.Adam(model.parameters(), lr=ADAM_LEARNING_RATE)
    bce = torch.nn.BCEWithLogitsLoss()
    for _ in range(ADAM_STEPS):
        optimizer.zero_grad()
        loss: torch.Tensor = bce(model(x), y) + _penalty(model, weight_decay)
        loss.backward()  # type: ignore[no-untyped-call]
        optimizer.step()
    with torch.no_grad():
        final = float(bce(model(x), y))
    return final, ADAM_STEPS, "Adam"
