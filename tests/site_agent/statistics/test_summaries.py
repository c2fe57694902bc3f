"""Tests of site_agent.statistics.summaries: mergeable sufficient statistics.

Random tables are invented for tests only. References are named beside each check.
"""

from __future__ import annotations

from functools import reduce
from typing import Any

import numpy as np
import pandas as pd
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from pydantic import ValidationError
from sklearn.metrics import confusion_matrix

from site_agent.contract.protocol import EvaluationPlan, uniform_edges
from site_agent.data.predictions import Predictions, validate_predictions
from site_agent.exceptions import InputError
from site_agent.statistics.summaries import (
    AgreementTable,
    ScoreHistogram,
    SufficientStatistics,
    compute_statistics,
    model_rater,
)

PLAN = EvaluationPlan(thresholds=(0.3, 0.5, 0.8), histogram_edges=uniform_edges(20))

SCORES = st.one_of(
    st.floats(0.0, 1.0, allow_nan=False),
    st.sampled_from([0.0, 0.3, 0.5, 0.8, 1.0, 0.25]),  # ties, thresholds and bin edges
)


@st.composite
def tables(draw: st.DrawFn, min_size: int = 1, max_size: int = 40) -> Predictions:
    """Draw an invented predictions table: patients with 1..n cases, pending labels, two readers."""
    n = draw(st.integers(min_size, max_size))
    n_patients = draw(st.integers(1, n))
    rows = {
        "case_id": [f"c{i}" for i in range(n)],
        "patient_id": [f"p{draw(st.integers(0, n_patients - 1))}" for _ in range(n)],
        "label": draw(st.lists(st.sampled_from(["0", "1", ""]), min_size=n, max_size=n)),
        "score": draw(st.lists(SCORES, min_size=n, max_size=n)),
        "category": draw(
            st.lists(st.sampled_from(["1", "2", "3", "4", "5"]), min_size=n, max_size=n)
        ),
        # Binary reader 0/1 and an ordinal reader on 2..5: a reader's scale is inferred from
        # its calls, so ordinal calls avoid {0, 1} to keep the scale the same on every split.
        "reader_a": draw(st.lists(st.sampled_from(["0", "1", ""]), min_size=n, max_size=n)),
        "reader_b": draw(
            st.lists(st.sampled_from(["2", "3", "4", "5", ""]), min_size=n, max_size=n)
        ),
        "scanner_vendor": draw(
            st.lists(st.sampled_from(["Altavue", "Koristo"]), min_size=n, max_size=n)
        ),
    }
    return validate_predictions(pd.DataFrame(rows))


def _assert_same(a: Any, b: Any, path: str = "") -> None:
    """Compare two model dumps: integers and strings exactly, floats to rounding error."""
    if isinstance(a, dict):
        assert a.keys() == b.keys(), path
        for key in a:
            _assert_same(a[key], b[key], f"{path}.{key}")
    elif isinstance(a, list | tuple):
        assert len(a) == len(b), path
        for i, (x, y) in enumerate(zip(a, b, strict=True)):
            _assert_same(x, y, f"{path}[{i}]")
    elif isinstance(a, float):
        assert a == pytest.approx(b, rel=1e-9, abs=1e-9), path
    else:
        assert a == b, path


def _patient_split(p: Predictions, assignment: list[int], k: int) -> list[Predictions]:
    patients = sorted(set(p.patient_id.tolist()))
    site_of = {pid: assignment[i % len(assignment)] % k for i, pid in enumerate(patients)}
    sites = np.array([site_of[pid] for pid in p.patient_id])
    return [p.subset(sites == s) for s in range(k)]


@settings(max_examples=60, deadline=None)
@given(p=tables(), assignment=st.lists(st.integers(0, 1), min_size=1, max_size=40))
def test_merge_of_two_sites_equals_statistics_of_their_union(
    p: Predictions, assignment: list[int]
) -> None:
    """Statistics of site A merged with site B equal the statistics of A ∪ B."""
    a, b = _patient_split(p, assignment, 2)
    merged = compute_statistics(a, PLAN).merge(compute_statistics(b, PLAN))
    _assert_same(merged.model_dump(), compute_statistics(p, PLAN).model_dump())


@settings(max_examples=40, deadline=None)
@given(
    p=tables(),
    assignment=st.lists(st.integers(0, 3), min_size=1, max_size=40),
    order=st.randoms(use_true_random=False),
)
def test_pooled_statistics_do_not_depend_on_split_or_merge_order(
    p: Predictions, assignment: list[int], order: Any
) -> None:
    """Splitting cases into four sites and merging in any order gives the same statistics."""
    sites = [compute_statistics(s, PLAN) for s in _patient_split(p, assignment, 4)]
    order.shuffle(sites)
    pooled = reduce(lambda x, y: x.merge(y), sites)
    _assert_same(pooled.model_dump(), compute_statistics(p, PLAN).model_dump())


@settings(max_examples=40, deadline=None)
@given(p=tables(min_size=2), seed=st.integers(0, 2**32 - 1))
def test_statistics_do_not_depend_on_row_order(p: Predictions, seed: int) -> None:
    """Shuffling the rows of a table leaves its statistics unchanged."""
    permutation = np.random.default_rng(seed).permutation(len(p))
    shuffled = Predictions(
        case_id=p.case_id[permutation],
        patient_id=p.patient_id[permutation],
        label=p.label[permutation],
        score=p.score[permutation],
        category=None if p.category is None else p.category[permutation],
        readers={k: v[permutation] for k, v in p.readers.items()},
        attributes={k: v[permutation] for k, v in p.attributes.items()},
    )
    _assert_same(
        compute_statistics(shuffled, PLAN).model_dump(), compute_statistics(p, PLAN).model_dump()
    )


@settings(max_examples=40, deadline=None)
@given(p=tables())
def test_counts_match_sklearn_numpy_and_pandas(p: Predictions) -> None:
    """Confusion counts, histograms, tables and patient moments match independent computations."""
    stats = compute_statistics(p, PLAN)
    known = p.label >= 0
    y, s = p.label[known], p.score[known]
    for c in stats.confusion:
        if y.size == 0:  # scikit-learn refuses empty input; nothing labelled, nothing counted
            assert (c.tp, c.fp, c.fn, c.tn) == (0, 0, 0, 0)
            continue
        # scikit-learn confusion_matrix, labels [0, 1]: [[tn, fp], [fn, tp]].
        (tn, fp), (fn, tp) = confusion_matrix(y, (s >= c.threshold).astype(int), labels=[0, 1])
        assert (c.tp, c.fp, c.fn, c.tn) == (tp, fp, fn, tn)
    # numpy.histogram uses the same bins: [e_i, e_i+1), the last one closed.
    edges = np.asarray(PLAN.histogram_edges)
    assert list(stats.histogram.all) == np.histogram(p.score, edges)[0].tolist()
    assert list(stats.histogram.positive) == np.histogram(s[y == 1], edges)[0].tolist()
    assert list(stats.histogram.negative) == np.histogram(s[y == 0], edges)[0].tolist()
    assert stats.n_pending == int((~known).sum())
    assert stats.n_patients == len(set(p.patient_id.tolist()))
    # Agreement of the binarised model with reader_a: scikit-learn confusion_matrix.
    ra = p.readers["reader_a"]
    for table in stats.agreement:
        if table.raters[1] == "reader_a" and table.raters[0].startswith("model@"):
            t = float(table.raters[0].removeprefix("model@"))
            both = ra >= 0
            if not both.any():
                assert table.n == 0
                continue
            expected = confusion_matrix((p.score[both] >= t).astype(int), ra[both], labels=[0, 1])
            assert table.matrix().tolist() == expected.tolist()
    # Per-patient moments of sensitivity at the first threshold, computed with pandas groupby.
    frame = pd.DataFrame({"patient": p.patient_id[known], "y": y, "hit": s >= PLAN.thresholds[0]})
    positives = frame[frame["y"] == 1]
    grouped = positives.groupby("patient").agg(a=("hit", "sum"), m=("hit", "size"))
    sens = stats.confusion[0].sensitivity
    assert sens.clusters == len(grouped)
    assert sens.sum_a2 == int((grouped["a"] ** 2).sum())
    assert sens.sum_am == int((grouped["a"] * grouped["m"]).sum())
    assert sens.sum_m2 == int((grouped["m"] ** 2).sum())


def test_ordinal_table_counts_match_sklearn() -> None:
    """The model-category vs ordinal-reader table equals scikit-learn's confusion matrix."""
    frame = pd.DataFrame(
        {
            "case_id": [f"c{i}" for i in range(8)],
            "patient_id": [f"p{i}" for i in range(8)],
            "label": ["1", "0", "1", "0", "1", "0", "", "0"],
            "score": ["0.9", "0.1", "0.7", "0.4", "0.6", "0.2", "0.5", "0.3"],
            "category": ["5", "1", "4", "2", "4", "1", "3", ""],
            "reader_b": ["5", "2", "3", "2", "4", "", "3", "1"],
        }
    )
    stats = compute_statistics(validate_predictions(frame), PLAN)
    (table,) = stats.agreement
    assert table.raters == ("model_category", "reader_b")
    assert table.categories == (1, 2, 3, 4, 5)
    both = [0, 1, 2, 3, 4, 6]  # cases where both made a call; the pending case counts too
    cat = [int(frame["category"][i]) for i in both]
    rdr = [int(frame["reader_b"][i]) for i in both]
    # scikit-learn confusion_matrix with labels 1..5 as the reference table.
    assert table.matrix().tolist() == confusion_matrix(cat, rdr, labels=[1, 2, 3, 4, 5]).tolist()


def test_merge_refuses_different_thresholds() -> None:
    """Statistics computed with different thresholds cannot be merged."""
    p = validate_predictions(
        pd.DataFrame(
            {
                "case_id": ["a", "b"],
                "patient_id": ["p", "q"],
                "label": ["1", "0"],
                "score": ["0.6", "0.2"],
            }
        )
    )
    a = compute_statistics(p, PLAN)
    b = compute_statistics(p, PLAN.model_copy(update={"thresholds": (0.5,)}))
    with pytest.raises(InputError, match="different thresholds"):
        a.merge(b)


def test_merge_rebins_histograms_to_shared_edges() -> None:
    """Histograms on nested bins merge exactly on the edges both kept (numpy as reference)."""
    rng = np.random.default_rng(7)
    n = 60
    frame = pd.DataFrame(
        {
            "case_id": [f"c{i}" for i in range(n)],
            "patient_id": [f"p{i}" for i in range(n)],
            "label": rng.integers(0, 2, n).astype(str),
            "score": rng.random(n).round(4).astype(str),
        }
    )
    fine = EvaluationPlan(histogram_edges=uniform_edges(20))
    coarse = EvaluationPlan(histogram_edges=uniform_edges(10))
    a = compute_statistics(validate_predictions(frame.iloc[:30]), fine)
    b = compute_statistics(validate_predictions(frame.iloc[30:]), coarse)
    merged = a.merge(b)
    scores = frame["score"].astype(float).to_numpy()
    labels = frame["label"].astype(int).to_numpy()
    # numpy.histogram on the union, on the coarse edges, is the reference.
    expected_pos, _ = np.histogram(scores[labels == 1], bins=np.array(uniform_edges(10)))
    assert merged.histogram.edges == uniform_edges(10)
    assert merged.histogram.positive == tuple(int(x) for x in expected_pos)
    assert (
        merged.calibration.count
        == compute_statistics(validate_predictions(frame), coarse).calibration.count
    )


def test_class_rows_on_their_own_edges_merge_exactly_row_by_row() -> None:
    """Each class keeps its own edges; a merge re-bins each row to the edges both kept.

    Reference: numpy.histogram of the union on each row's shared edges.
    """
    rng = np.random.default_rng(8)
    scores = rng.random(80).round(4)
    labels = rng.integers(0, 2, 80)
    grid = uniform_edges(20)

    def site(rows: slice, positive: tuple[float, ...], negative: tuple[float, ...]) -> Any:
        s, y = scores[rows], labels[rows]
        full = ScoreHistogram(
            edges=grid,
            positive=tuple(int(v) for v in np.histogram(s[y == 1], bins=np.array(grid))[0]),
            negative=tuple(int(v) for v in np.histogram(s[y == 0], bins=np.array(grid))[0]),
            all=tuple(int(v) for v in np.histogram(s, bins=np.array(grid))[0]),
        )
        both = tuple(sorted(set(positive) & set(negative)))
        return full.with_edges(both, positive, negative)

    a = site(slice(0, 40), uniform_edges(20), uniform_edges(5))
    b = site(slice(40, 80), uniform_edges(10), uniform_edges(10))
    merged = a.merge(b)

    for name, label, edges in (
        ("positive", 1, uniform_edges(10)),
        ("negative", 0, uniform_edges(5)),
    ):
        assert merged.class_edges(name) == edges
        expected, _ = np.histogram(scores[labels == label], bins=np.array(edges))
        assert getattr(merged, name) == tuple(int(v) for v in expected)
    assert merged.edges == uniform_edges(5)
    assert merged.all == tuple(
        int(v) for v in np.histogram(scores, bins=np.array(uniform_edges(5)))[0]
    )
    with pytest.raises(ValidationError):  # the all row may not be finer than a class row
        ScoreHistogram(
            edges=uniform_edges(10),
            positive=(1,) * 5,
            negative=(1,) * 10,
            all=(1,) * 10,
            positive_edges=uniform_edges(5),
        )


def test_histograms_without_a_shared_interior_edge_merge_into_one_bin() -> None:
    """Binnings that share only 0 and 1 merge exactly into the single bin [0, 1]."""
    p = validate_predictions(
        pd.DataFrame({"case_id": ["a"], "patient_id": ["p"], "label": ["1"], "score": ["0.6"]})
    )
    a = compute_statistics(p, EvaluationPlan(histogram_edges=(0.0, 0.3, 1.0)))
    b = compute_statistics(p, EvaluationPlan(histogram_edges=(0.0, 0.6, 1.0)))
    merged = a.merge(b).histogram
    assert merged.edges == (0.0, 1.0)
    assert merged.positive == (2,)


def test_merge_refuses_binary_and_ordinal_tables_of_same_raters() -> None:
    """A reader binary at one site and ordinal at another cannot be pooled."""
    binary = AgreementTable(
        raters=("reader_a", "reader_b"), scale="binary", categories=(0, 1), counts=((1, 0), (0, 1))
    )
    ordinal = AgreementTable(
        raters=("reader_a", "reader_b"), scale="ordinal", categories=(1, 2), counts=((1, 0), (0, 1))
    )
    with pytest.raises(InputError, match="scales"):
        binary.merge(ordinal)


def test_ordinal_merge_widens_categories_and_keeps_counts() -> None:
    """Merging ordinal tables over 1..2 and 2..3 gives a 1..3 table holding both."""
    a = AgreementTable(
        raters=("x", "y"), scale="ordinal", categories=(1, 2), counts=((3, 1), (0, 2))
    )
    b = AgreementTable(
        raters=("x", "y"), scale="ordinal", categories=(2, 3), counts=((4, 0), (1, 5))
    )
    merged = a.merge(b)
    assert merged.categories == (1, 2, 3)
    assert merged.matrix().tolist() == [[3, 1, 0], [0, 6, 0], [0, 1, 5]]


def test_histogram_with_more_counts_than_bins_is_rejected() -> None:
    """A histogram cannot carry a list longer than its bins (no room for per-case values)."""
    with pytest.raises(ValidationError, match="one entry per bin"):
        ScoreHistogram(edges=(0.0, 0.5, 1.0), positive=(1, 2, 3), negative=(0, 0), all=(1, 2))


def test_histogram_with_too_many_bins_is_rejected() -> None:
    """Edges defining more than the allowed number of bins are refused."""
    edges = uniform_edges(2000)
    zeros = (0,) * 2000
    with pytest.raises(ValidationError, match="between 1 and"):
        ScoreHistogram(edges=edges, positive=zeros, negative=zeros, all=zeros)


def test_negative_and_fractional_counts_are_rejected() -> None:
    """Counts must be non-negative integers."""
    with pytest.raises(ValidationError):
        ScoreHistogram(edges=(0.0, 0.5, 1.0), positive=(-1, 0), negative=(0, 0), all=(0, 0))
    with pytest.raises(ValidationError):
        ScoreHistogram(edges=(0.0, 0.5, 1.0), positive=(0.5, 0), negative=(0, 0), all=(0, 0))


def test_statistics_reject_unknown_fields() -> None:
    """Extra fields (for example a smuggled list of case scores) are refused."""
    p = validate_predictions(
        pd.DataFrame({"case_id": ["a"], "patient_id": ["p"], "label": ["1"], "score": ["0.6"]})
    )
    dump = compute_statistics(p, PLAN).model_dump()
    dump["scores"] = [0.6]
    with pytest.raises(ValidationError, match="Extra inputs"):
        SufficientStatistics.model_validate(dump)


def test_model_rater_names_threshold() -> None:
    """The binarised model is named by its threshold."""
    assert model_rater(0.5) == "model@0.5"
