"""The HTML study report and the CSV exports, rendered from real statistics.

The study results are computed, not invented: the Wisconsin diagnostic breast cancer
data (scikit-learn's ``load_breast_cancer``; Street, Wolberg & Mangasarian 1993) is
split into three pseudo-sites by tertile of "mean texture" (a covariate shift), a
logistic regression on two features is fitted at the first (development) site, and every estimate
comes from scikit-learn, statsmodels or scipy.
"""

from __future__ import annotations

import math
import re
from datetime import UTC, datetime
from functools import cache
from html.parser import HTMLParser
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
from numpy.typing import NDArray
from scipy import stats
from scipy.special import expit, logit
from sklearn.calibration import calibration_curve
from sklearn.datasets import load_breast_cancer
from sklearn.linear_model import LogisticRegression
from sklearn.metrics import (
    brier_score_loss,
    cohen_kappa_score,
    confusion_matrix,
    roc_auc_score,
    roc_curve,
)
from sklearn.pipeline import make_pipeline
from sklearn.preprocessing import StandardScaler
from statsmodels.stats.meta_analysis import combine_effects
from statsmodels.stats.proportion import proportion_confint

from coordinator.pooling.study_results import (
    CurvePoints,
    MetaRow,
    MetricRow,
    ParticipantFlow,
    SiteOutcome,
    StudyResults,
    TwoByTwo,
)
from coordinator.report.exports import EXPORT_FILES, write_exports
from coordinator.report.study_report import render_report
from site_agent.notices import RESEARCH_NOTICE

Z = float(stats.norm.ppf(0.975))
THRESHOLDS = (0.3, 0.5)
RELEASED = ("Site A", "St Mary's & North", "Site C")
DECLINED = '<script>alert("x")</script> Clinic'
SILENT = "Lakeside"
LARGE = "tumour size=large"
NO_NEGATIVES = "no reference-standard negatives in this subgroup"
NAN = float("nan")


def _delong_auc(y: NDArray[np.int_], s: NDArray[np.float64]) -> tuple[float, float]:
    """Return the AUC and its DeLong variance by counting pairs.

    DeLong ER, DeLong DM, Clarke-Pearson DL (1988). Biometrics 44:837-845: placement
    values V10 (per positive) and V01 (per negative), var = S10/m + S01/n.
    """
    pos, neg = s[y == 1], s[y == 0]
    psi = (pos[:, None] > neg[None, :]) + 0.5 * (pos[:, None] == neg[None, :])
    v10, v01 = psi.mean(axis=1), psi.mean(axis=0)
    return float(psi.mean()), float(v10.var(ddof=1) / len(pos) + v01.var(ddof=1) / len(neg))


def _wilson(site: str, metric: str, k: int, n: int, t: float, subgroup: str | None) -> MetricRow:
    if n == 0:
        return MetricRow(
            site=site,
            metric=metric,
            method="wilson",
            estimate=NAN,
            lower=NAN,
            upper=NAN,
            threshold=t,
            n=0,
            subgroup=subgroup,
            reason=NO_NEGATIVES if metric == "specificity" else "no cases in this cell",
        )
    lo, hi = proportion_confint(k, n, alpha=0.05, method="wilson")  # statsmodels Wilson interval
    return MetricRow(
        site=site,
        metric=metric,
        method="wilson",
        estimate=k / n,
        lower=float(lo),
        upper=float(hi),
        threshold=t,
        n=n,
        subgroup=subgroup,
    )


def _site_rows(
    site: str, y: NDArray[np.int_], s: NDArray[np.float64], subgroup: str | None = None
) -> tuple[list[MetricRow], list[TwoByTwo]]:
    rows: list[MetricRow] = []
    tables: list[TwoByTwo] = []
    n = len(y)
    if subgroup is None:
        auc, var = _delong_auc(y, s)
        assert auc == pytest.approx(roc_auc_score(y, s))  # scikit-learn roc_auc_score
        se = math.sqrt(var)
        rows.append(
            MetricRow(
                site=site,
                metric="auc",
                method="delong",
                estimate=auc,
                lower=max(0.0, auc - Z * se),
                upper=min(1.0, auc + Z * se),
                n=n,
            )
        )
        se_logit = se / (auc * (1 - auc))  # delta method on logit(AUC)
        lo, hi = expit(logit(auc) - Z * se_logit), expit(logit(auc) + Z * se_logit)
        rows.append(
            MetricRow(
                site=site,
                metric="auc",
                method="delong-logit",
                estimate=auc,
                lower=float(lo),
                upper=float(hi),
                n=n,
            )
        )
        rows.append(
            MetricRow(
                site=site,
                metric="brier",
                method="none",
                estimate=brier_score_loss(y, s),
                lower=NAN,
                upper=NAN,
                n=n,
            )
        )
        # Calibration slope: logistic recalibration on logit(score), clipped (common practice).
        fit = sm.GLM(
            y, sm.add_constant(logit(np.clip(s, 1e-6, 1 - 1e-6))), family=sm.families.Binomial()
        ).fit()
        (_, slope), ci = fit.params, fit.conf_int()
        rows.append(
            MetricRow(
                site=site,
                metric="calibration_slope",
                method="wald",
                estimate=float(slope),
                lower=float(ci[1, 0]),
                upper=float(ci[1, 1]),
                n=n,
            )
        )
        kappa = cohen_kappa_score(y, (s >= 0.5).astype(int))  # scikit-learn Cohen's kappa
        rows.append(
            MetricRow(
                site=site, metric="kappa", method="none", estimate=kappa, lower=NAN, upper=NAN, n=n
            )
        )
    else:
        rows.append(
            MetricRow(
                site=site,
                metric="auc",
                method="delong",
                estimate=NAN,
                lower=NAN,
                upper=NAN,
                n=n,
                subgroup=subgroup,
                reason="AUC needs both positive and negative cases",
            )
        )
    for t in THRESHOLDS:
        tn, fp, fn, tp = confusion_matrix(y, (s >= t).astype(int), labels=[0, 1]).ravel()
        rows.append(_wilson(site, "sensitivity", int(tp), int(tp + fn), t, subgroup))
        rows.append(_wilson(site, "specificity", int(tn), int(tn + fp), t, subgroup))
        if subgroup is None:
            rows.append(_wilson(site, "ppv", int(tp), int(tp + fp), t, subgroup))
            rows.append(_wilson(site, "npv", int(tn), int(tn + fn), t, subgroup))
            tables.append(TwoByTwo(site=site, threshold=t, tp=tp, fp=fp, fn=fn, tn=tn))
    return rows, tables


def _curves(site: str, y: NDArray[np.int_], s: NDArray[np.float64]) -> list[CurvePoints]:
    fpr, tpr, _ = roc_curve(y, s)  # scikit-learn roc_curve
    observed, predicted = calibration_curve(y, s, n_bins=8)  # scikit-learn, uniform bins
    counts = np.histogram(s, bins=np.linspace(0, 1, 9))[0]
    return [
        CurvePoints(site=site, kind="roc", x=fpr.tolist(), y=tpr.tolist()),
        CurvePoints(
            site=site,
            kind="calibration",
            x=predicted.tolist(),
            y=observed.tolist(),
            counts=[int(c) for c in counts if c > 0],
        ),
    ]


def _meta(metric: str, y: list[float], v: list[float]) -> list[MetaRow]:
    """Pool logit-scale site estimates with statsmodels: DerSimonian-Laird, then fixed effect."""
    res = combine_effects(np.array(y), np.array(v), method_re="dl", use_t=False)
    frame = res.summary_frame()
    k = len(y)
    rows = []
    for label, method, tau2 in (("random effect", "dl", res.tau2), ("fixed effect", "fixed", 0)):
        mu, se = frame.loc[label, "eff"], frame.loc[label, "sd_eff"]
        # Prediction interval: Higgins, Thompson & Spiegelhalter (2009), JRSS A 172:137, t(k-2);
        # none under a fixed-effect model (common practice).
        half = stats.t.ppf(0.975, k - 2) * math.sqrt(tau2 + se**2) if tau2 else NAN
        rows.append(
            MetaRow(
                metric=metric,
                method=method,
                scale="logit",
                estimate=expit(mu),
                lower=expit(frame.loc[label, "ci_low"]),
                upper=expit(frame.loc[label, "ci_upp"]),
                prediction_lower=expit(mu - half),
                prediction_upper=expit(mu + half),
                tau2=tau2,
                i2=res.i2,
                h2=res.h2,
                q=res.q,
                q_pvalue=res.test_homogeneity().pvalue,
                k=k,
            )
        )
    return rows


@cache
def _data() -> tuple[
    dict[str, NDArray[np.int_]], dict[str, NDArray[np.float64]], dict[str, NDArray[np.bool_]]
]:
    frame = load_breast_cancer(as_frame=True).frame
    label = (1 - frame.pop("target")).to_numpy()  # positive = malignant
    tertile = pd.qcut(frame["mean texture"], 3, labels=False).to_numpy()
    model = make_pipeline(StandardScaler(), LogisticRegression(max_iter=2000))
    features = ["mean smoothness", "mean compactness"]  # two weak features: AUC well below 1
    model.fit(frame.loc[tertile == 0, features], label[tertile == 0])
    scores = model.predict_proba(frame[features])[:, 1]
    ys = {site: label[tertile == i] for i, site in enumerate(RELEASED)}
    ss = {site: scores[tertile == i] for i, site in enumerate(RELEASED)}
    large = (frame["mean radius"] >= 18).to_numpy()  # all such tumours here are malignant
    return ys, ss, {site: large[tertile == i] for i, site in enumerate(RELEASED)}


@cache
def breast_cancer_results() -> StudyResults:
    """Return study results computed from three pseudo-sites of the breast cancer data."""
    ys, ss, large = _data()
    metrics: list[MetricRow] = []
    tables: list[TwoByTwo] = []
    curves: list[CurvePoints] = []
    flow = []
    for site in RELEASED:
        y, s = ys[site], ss[site]
        rows, t22 = _site_rows(site, y, s)
        sub, _ = _site_rows(site, y[large[site]], s[large[site]], subgroup=LARGE)
        metrics += rows + sub
        tables += t22
        curves += _curves(site, y, s)
        flow.append(
            ParticipantFlow(
                site=site,
                observations=len(y),
                patients=len(y),
                with_reference_standard=len(y),
                pending_reference_standard=0,
                positives=int(y.sum()),
                negatives=int((1 - y).sum()),
            )
        )
    y_all, s_all = np.concatenate(list(ys.values())), np.concatenate(list(ss.values()))
    metrics += _site_rows("pooled", y_all, s_all)[0]
    curves += _curves("pooled", y_all, s_all)
    auc_logit, auc_var = [], []
    for site in RELEASED:
        auc, var = _delong_auc(ys[site], ss[site])
        auc_logit.append(float(logit(auc)))
        auc_var.append(var / (auc * (1 - auc)) ** 2)  # delta method
    sens = [
        r
        for r in metrics
        if r.metric == "sensitivity"
        and r.threshold == 0.5
        and r.subgroup is None
        and r.site != "pooled"
    ]
    sens_logit = [float(logit(r.estimate)) for r in sens]
    sens_var = [1 / (r.n * r.estimate * (1 - r.estimate)) for r in sens]  # var of logit(p)
    sites = [
        SiteOutcome(
            site=RELEASED[0],
            status="released",
            role="development",
            description="lowest tertile of mean texture",
        )
    ]
    sites += [
        SiteOutcome(site=s, status="released", description=f"tertile {i + 2} of mean texture")
        for i, s in enumerate(RELEASED[1:])
    ]
    sites += [
        SiteOutcome(site=DECLINED, status="declined", reason="minimum cell size not met"),
        SiteOutcome(site=SILENT, status="silent", reason="no reply before the deadline"),
    ]
    return StudyResults(
        study_id="breast-cancer-pseudo-sites",
        title="Breast cancer classifier across three pseudo-sites",
        protocol_hash="sha256:" + "0" * 64,
        created_at=datetime(2026, 1, 1, tzinfo=UTC),
        engine="test",
        sites=sites,
        metrics=metrics,
        curves=curves,
        two_by_two=tables,
        flow=flow,
        meta=_meta("auc", auc_logit, auc_var) + _meta("sensitivity@0.5", sens_logit, sens_var),
        findings=[f"The model was developed at {RELEASED[0]} and checked at two other sites."],
        notes=["Pseudo-sites are tertiles of one covariate of a public data set."],
    )


class _Page(HTMLParser):
    """Collect tags, attributes, ids and the text inside each element with an id."""

    def __init__(self) -> None:
        super().__init__()
        self.tags: list[tuple[str, dict[str, str | None]]] = []
        self.text_by_id: dict[str, str] = {}
        self._open: list[tuple[str, str | None]] = []
        self.text: list[str] = []

    def handle_starttag(self, tag: str, attrs: list[tuple[str, str | None]]) -> None:
        attributes = dict(attrs)
        self.tags.append((tag, attributes))
        element_id = attributes.get("id")
        if element_id is not None and tag in {"table", "figure", "section", "div", "footer"}:
            self.text_by_id[element_id] = ""
        self._open.append((tag, element_id))
        self.handle_data(" ")  # keep neighbouring cells apart in the collected text

    def handle_endtag(self, tag: str) -> None:
        while self._open:
            if self._open.pop()[0] == tag:
                break

    def handle_data(self, data: str) -> None:
        self.text.append(data)
        for _, element_id in self._open:
            if element_id in self.text_by_id:
                self.text_by_id[element_id] += data

    def text_of(self, element_id: str) -> str:
        return re.sub(r"\s+", " ", self.text_by_id[element_id])

    def ids(self) -> set[str]:
        return {a["id"] for _, a in self.tags if a.get("id")}  # type: ignore[misc]


@pytest.fixture(scope="module")
def page(tmp_path_factory: pytest.TempPathFactory) -> _Page:
    path = render_report(breast_cancer_results(), tmp_path_factory.mktemp("report") / "r.html")
    parser = _Page()
    parser.feed(path.read_text(encoding="utf-8"))
    return parser


def test_report_names_every_invited_site(page: _Page) -> None:
    """Every invited site, released or not, is named in the report text."""
    text = "".join(page.text)
    for site in (*RELEASED, DECLINED, SILENT):
        assert site in text


def test_report_has_every_figure_and_table_id(page: _Page) -> None:
    """Each section's figures and tables carry the ids the documentation promises."""
    ids = page.ids()
    expected = {
        "table-sites",
        "table-flow",
        "table-site-metrics",
        "table-threshold-metrics",
        "fig-forest-auc",
        "fig-forest-sensitivity-0-5",
        "table-heterogeneity",
        "fig-roc-all",
        "fig-roc-sites",
        "fig-calibration-sites",
        "table-not-released",
        "table-subgroups",
        "table-stard",
    }
    assert expected <= ids
    assert sum(i.startswith("table-2x2-") for i in ids) == len(RELEASED) * len(THRESHOLDS)


def test_every_figure_has_one_inline_svg_and_a_caption(page: _Page) -> None:
    """Figures are inline SVG with a caption; nothing is loaded from outside the file."""
    tags = [t for t, _ in page.tags]
    figures = tags.count("figure")
    assert figures == 5  # 2 forest plots (one per pooled metric), 2 ROC, 1 calibration
    assert tags.count("figcaption") == figures
    assert tags.count("svg") == figures
    assert not {"img", "script", "link", "iframe", "object", "embed"} & set(tags)


def test_report_references_no_web_resource(page: _Page) -> None:
    """No src or href points to http(s); links stay inside the page."""
    for _, attrs in page.tags:
        for name in ("src", "href", "xlink:href"):
            value = attrs.get(name) or ""
            assert not re.match(r"\s*https?://", value, re.IGNORECASE), value
            if value:
                assert value.startswith("#"), value


def test_research_notice_is_at_top_and_bottom(page: _Page) -> None:
    """The research-tool caution opens and closes the report."""
    assert RESEARCH_NOTICE in page.text_of("caution-top")
    assert RESEARCH_NOTICE in page.text_of("caution-bottom")
    assert "".join(page.text).index(RESEARCH_NOTICE) < "".join(page.text).index("Participant")


def test_undefined_values_show_a_dash_and_their_reason(page: _Page) -> None:
    """A specificity with no negative cases reads as a dash followed by why."""
    ys, _, large = _data()
    assert all(ys[site][large[site]].all() for site in RELEASED)  # no benign large tumour
    assert f"— {NO_NEGATIVES}" in page.text_of("table-subgroups")


def test_site_auc_and_sensitivity_match_scikit_learn(page: _Page) -> None:
    """Per-site AUC (3 decimals) and sensitivity (percent, 1 decimal) match scikit-learn."""
    ys, ss, _ = _data()
    table = page.text_of("table-site-metrics")
    thresholds = page.text_of("table-threshold-metrics")
    for site in RELEASED:
        assert f"{roc_auc_score(ys[site], ss[site]):.3f}" in table  # scikit-learn
        _, _, fn, tp = confusion_matrix(ys[site], ss[site] >= 0.5).ravel()
        assert f"{100 * tp / (tp + fn):.1f}%" in thresholds  # scikit-learn confusion_matrix


def test_heterogeneity_table_shows_statsmodels_i2(page: _Page) -> None:
    """I² in the table is the statsmodels value, as a percentage with one decimal."""
    meta = breast_cancer_results().meta[0]
    assert f"{100 * meta.i2:.1f}%" in page.text_of("table-heterogeneity")  # statsmodels


def test_site_names_are_escaped(tmp_path: Path) -> None:
    """A site name holding markup is shown as text, never as a tag."""
    raw = render_report(breast_cancer_results(), tmp_path / "r.html").read_text()
    assert "<script" not in raw
    assert "&lt;script&gt;" in raw
    assert "St Mary&#x27;s &amp; North" in raw


def test_exports_hold_every_row_and_match_scikit_learn(tmp_path: Path) -> None:
    """The CSV files hold every row, and sites.csv carries scikit-learn's AUC per site."""
    results = breast_cancer_results()
    paths = write_exports(results, tmp_path / "csv")
    assert [p.name for p in paths] == list(EXPORT_FILES)
    assert len(pd.read_csv(paths[0])) == len(results.metrics)
    assert len(pd.read_csv(paths[1])) == len(results.meta)
    assert len(pd.read_csv(paths[2])) == len(results.two_by_two)
    flow = pd.read_csv(paths[3]).set_index("site")
    sites = pd.read_csv(paths[4]).set_index("site")
    ys, ss, _ = _data()
    for site in RELEASED:
        assert sites.loc[site, "auc"] == pytest.approx(roc_auc_score(ys[site], ss[site]))
        assert flow.loc[site, "prevalence"] == pytest.approx(ys[site].mean())
    assert sites.loc[DECLINED, "status"] == "declined"
    assert math.isnan(sites.loc[SILENT, "auc"])


def test_numbers_in_metric_tables_are_in_the_exports(page: _Page, tmp_path: Path) -> None:
    """Each number shown in the per-site tables is a rounded value from metrics.csv."""
    frame = pd.read_csv(write_exports(breast_cancer_results(), tmp_path)[0])
    values = pd.concat([frame[c] for c in ("estimate", "lower", "upper")]).dropna()
    known = {f"{v:.3f}" for v in values} | {f"{100 * v:.1f}%" for v in values}
    known |= {str(n) for n in frame["n"]} | {f"{t:g}" for t in frame["threshold"].dropna()}
    for table in ("table-site-metrics", "table-threshold-metrics"):
        text = page.text_of(table).replace("(95% CI)", "")  # the caption names the level
        shown = re.findall(r"\d+\.\d+%?|\b\d+\b", text)
        assert shown
        assert set(shown) <= known, set(shown) - known


def test_study_where_no_site_released_renders_and_exports(tmp_path: Path) -> None:
    """With every site declined, the report says so and the exports are written empty."""
    results = StudyResults(
        study_id="none-released",
        title="Nobody released",
        protocol_hash="sha256:" + "1" * 64,
        created_at=datetime(2026, 1, 1, tzinfo=UTC),
        engine="test",
        sites=[SiteOutcome(site=SILENT, status="silent", reason="no reply before the deadline")],
        metrics=[],
    )
    parser = _Page()
    parser.feed(render_report(results, tmp_path / "r.html").read_text(encoding="utf-8"))
    assert RESEARCH_NOTICE in parser.text_of("caution-bottom")
    assert "no reply before the deadline" in parser.text_of("table-not-released")
    assert "table-site-metrics" in parser.ids()
    paths = write_exports(results, tmp_path / "csv")
    assert len(pd.read_csv(paths[4])) == 1  # sites.csv: the silent site
    assert all(p.exists() for p in paths)


def test_roc_labels_give_the_area_of_a_curve_drawn_from_coarse_bins(tmp_path: Path) -> None:
    """A ROC curve drawn from coarse score bins is labelled with its own area beside the AUC."""
    ys, ss, _ = _data()
    site = RELEASED[1]
    binned = np.floor(ss[site] * 4) / 4  # four score bins: the drawn curve is much coarser
    fpr, tpr, _ = roc_curve(ys[site], binned)  # scikit-learn roc_curve
    coarse = CurvePoints(site=site, kind="roc", x=fpr.tolist(), y=tpr.tolist())
    results = breast_cancer_results()
    curves = [coarse if (c.site, c.kind) == (site, "roc") else c for c in results.curves]
    path = render_report(results.model_copy(update={"curves": curves}), tmp_path / "r.html")
    parser = _Page()
    parser.feed(path.read_text(encoding="utf-8"))
    area = roc_auc_score(ys[site], binned)  # scikit-learn: area under the binned curve
    auc, _ = _delong_auc(ys[site], ss[site])
    assert f"{area:.3f}" != f"{auc:.3f}"
    for figure in ("fig-roc-all", "fig-roc-sites"):
        text = parser.text_of(figure)
        assert f"{auc:.3f}; curve area {area:.3f}" in text
        assert "drawn from the score bins" in text
    exact, _ = _delong_auc(ys[RELEASED[2]], ss[RELEASED[2]])  # its curve is not binned
    assert f"{exact:.3f}; curve area" not in parser.text_of("fig-roc-sites")
