"""Summaries across subjects, checked against scipy/numpy and distribution facts.

The fits here are :class:`FitRecord` s built by hand (no estimation), so every number
has a reference computed independently.
"""

from __future__ import annotations

import math

import numpy as np
import pandas as pd
import pytest
from scipy import stats

from compartments.summaries import (
    EXPLORATORY,
    FitRecord,
    Quantity,
    as_record,
    covariate_correlations,
    describe,
    failures,
    fits_from_document,
    group_summary,
    group_tests,
    model_preference,
    parameter_summary,
    parameter_table,
    pool_runs,
    subject_comparisons,
)


def records(values: dict[str, list[float]], model: str = "m", units: dict[str, str] | None = None,
            prefix: str = "") -> list[FitRecord]:
    n = len(next(iter(values.values())))
    return [FitRecord(f"{prefix}{i + 1}", model, "ok", estimates={k: v[i] for k, v in values.items()},
                      units=units or {}) for i in range(n)]


class TestDescribe:
    def test_against_numpy_and_scipy(self):
        """Geometric mean equals scipy.stats.gmean; median, min, max, mean, SD (n − 1) equal numpy."""
        x = np.random.default_rng(0).lognormal(0.0, 0.4, 25)
        d = describe(x)
        assert d["n"] == 25
        assert d["geo_mean"] == pytest.approx(stats.gmean(x))
        assert d["median"] == pytest.approx(np.median(x)) and d["min"] == x.min() and d["max"] == x.max()
        assert d["mean"] == pytest.approx(x.mean()) and d["sd"] == pytest.approx(x.std(ddof=1))

    def test_geometric_cv_is_the_lognormal_cv(self):
        """For a log-normal variable the CV is √(exp(σ²) − 1) (Johnson, Kotz & Balakrishnan,
        Continuous Univariate Distributions vol. 1, 2nd ed., 1994, ch. 14): the geometric CV %
        of a large sample with σ = 0.25 is 25.4 % and matches its arithmetic CV."""
        x = np.random.default_rng(1).lognormal(np.log(3.0), 0.25, 200_000)
        d = describe(x)
        assert d["geo_cv_percent"] == pytest.approx(100 * math.sqrt(math.exp(0.25**2) - 1), rel=0.01)
        assert d["geo_cv_percent"] == pytest.approx(100 * x.std(ddof=1) / x.mean(), rel=0.01)
        assert d["geo_mean"] == pytest.approx(3.0, rel=0.01)  # exp(μ), the log-normal median

    def test_outliers_beyond_three_robust_sd(self):
        """A value far out on the log scale is flagged; the robust SD is 1.4826·MAD, the
        constant being 1/Φ⁻¹(3/4) (scipy.stats.norm)."""
        assert 1 / stats.norm.ppf(0.75) == pytest.approx(1.4826, abs=1e-4)
        x = np.exp(np.array([0.0, 0.1, -0.1, 0.05, -0.05, 0.2, -0.2, 2.0]))
        ids = [f"s{i}" for i in range(x.size)]
        assert describe(x, ids)["outlying"] == "s7"
        logs = np.log(x)
        mad = np.median(np.abs(logs - np.median(logs)))
        limit = 3 * 1.4826 * mad
        assert abs(logs[7] - np.median(logs)) > limit and all(abs(v - np.median(logs)) <= limit for v in logs[:7])
        assert describe(np.exp([0.0, 0.1, -0.1, 0.05, -0.05]), ids[:5])["outlying"] == ""

    def test_non_positive_and_missing_values(self):
        """Non-finite values are left out; geometric statistics need positive values."""
        d = describe([1.0, np.nan, 4.0, np.inf])
        assert d["n"] == 2 and d["geo_mean"] == pytest.approx(2.0)
        d = describe([-1.0, 1.0, 2.0])
        assert math.isnan(d["geo_mean"]) and math.isnan(d["geo_cv_percent"]) and d["median"] == 1.0
        d = describe([])
        assert d["n"] == 0 and math.isnan(d["mean"])


class TestParameterSummary:
    def test_parameters_then_derived_failed_left_out(self):
        """Estimates first, derived quantities after; failed fits do not count."""
        fits = [FitRecord("1", "m", "ok", estimates={"ke": 0.1}, units={"ke": "1/h"},
                          derived={"half_life": Quantity(math.log(2) / 0.1, "h")}),
                FitRecord("2", "m", "ok", estimates={"ke": 0.2}, units={"ke": "1/h"},
                          derived={"half_life": Quantity(math.log(2) / 0.2, "h")}),
                FitRecord("3", "m", "failed", "too few observations"),
                FitRecord("1", "other", "ok", estimates={"ke": 9.0})]
        s = parameter_summary(fits, "m")
        assert list(s.index) == ["ke", "half_life"] and list(s["kind"]) == ["parameter", "derived"]
        assert list(s["n"]) == [2, 2] and s.loc["ke", "unit"] == "1/h" and s.loc["half_life", "unit"] == "h"
        # ln2/ke: the geometric mean of half-lives is ln2 over the geometric mean of ke
        assert s.loc["half_life", "geo_mean"] == pytest.approx(math.log(2) / s.loc["ke", "geo_mean"])
        assert parameter_table(fits, "m").index.tolist() == ["1", "2"]
        assert len(parameter_summary(fits, "m", derived=False)) == 1


class TestModels:
    @pytest.fixture
    def fits(self):
        aic = {"1": {"a": 10.0, "b": 12.0, "c": 30.0}, "2": {"a": 20.0, "b": 15.0, "c": None},
               "3": {"a": 5.0, "b": 5.5, "c": 4.0}}
        out = []
        for s, per in aic.items():
            for m, v in per.items():
                out.append(FitRecord(s, m, "ok", aic=v) if v is not None else FitRecord(s, m, "failed", "singular"))
        return out

    def test_preference_counts_and_sums(self, fits):
        """Counts of lowest AIC per subject; sums over the subjects where every model was fitted."""
        t = model_preference(fits)
        assert t["preferred"].to_dict() == {"a": 1, "b": 1, "c": 1}
        assert t.loc["c", "failed"] == 1 and t.loc["c", "failed_subjects"] == "2" and t.loc["a", "fitted"] == 3
        assert t.loc["a", "n_common"] == 2  # subjects 1 and 3
        assert t.loc["a", "summed"] == 15.0 and t.loc["b", "summed"] == 17.5 and t.loc["c", "summed"] == 34.0
        assert t.loc["a", "delta_summed"] == 0.0 and t.loc["c", "delta_summed"] == 19.0

    def test_weights_are_akaike_weights(self, fits):
        """w_i = exp(−Δ_i/2)/Σ exp(−Δ_j/2) (Burnham & Anderson 2002, §2.9), worked by hand for subject 1."""
        t = subject_comparisons(fits)
        raw = np.exp(-0.5 * np.array([0.0, 2.0, 20.0]))
        assert t.loc["1", ["a", "b", "c"]].tolist() == pytest.approx((raw / raw.sum()).tolist())
        assert t.loc["2", "preferred"] == "b" and t.loc["2", "failed"] == "c" and math.isnan(t.loc["2", "c"])
        assert t.loc["1", "margin"] == 2.0
        mean_w = model_preference(fits).loc["a", "mean_weight"]
        assert mean_w == pytest.approx(t["a"].mean())

    def test_failures(self, fits):
        f = failures(fits)
        assert f.to_dict("records") == [{"subject": "2", "model": "c", "reason": "singular"}]


class TestGroups:
    def test_two_groups_mann_whitney(self):
        """Two groups: the p-value equals scipy.stats.mannwhitneyu (two-sided)."""
        ke = [0.10, 0.12, 0.09, 0.11, 0.13, 0.20, 0.22, 0.19, 0.25, 0.21]
        fits = records({"ke": ke})
        cov = {str(i + 1): {"arm": "A" if i < 5 else "B"} for i in range(10)}
        t = group_tests(fits, cov, "arm", "m")
        ref = stats.mannwhitneyu(ke[:5], ke[5:], alternative="two-sided")
        assert t.loc["ke", "test"] == "Mann–Whitney U" and t.loc["ke", "groups"] == "A (5), B (5)"
        assert t.loc["ke", "p_exploratory"] == pytest.approx(ref.pvalue)
        assert t.loc["ke", "statistic"] == pytest.approx(ref.statistic)
        assert t.attrs["note"] == EXPLORATORY and "exploratory" in t.attrs["note"]
        g = group_summary(fits, cov, "arm", "m")
        assert g.loc[("B", "ke"), "geo_mean"] == pytest.approx(stats.gmean(ke[5:]))
        assert g.index.names == ["arm", "parameter"]

    def test_three_groups_kruskal(self):
        """More groups: Kruskal–Wallis (scipy.stats.kruskal); a group of one takes no part;
        numeric group labels sort as numbers."""
        rng = np.random.default_rng(3)
        v = rng.lognormal(0, 0.3, 13)
        dose = [10] * 4 + [100] * 4 + [5] * 4 + [50]
        fits = records({"V": list(v)})
        cov = {str(i + 1): {"dose": d} for i, d in enumerate(dose)}
        t = group_tests(fits, cov, "dose", "m")
        ref = stats.kruskal(v[8:12], v[:4], v[4:8])
        assert t.loc["V", "test"] == "Kruskal–Wallis H" and t.loc["V", "groups"] == "5 (4), 10 (4), 100 (4)"
        assert t.loc["V", "p_exploratory"] == pytest.approx(ref.pvalue)
        assert list(dict.fromkeys(group_summary(fits, cov, "dose", "m").index.get_level_values(0))) == \
            ["5", "10", "50", "100"]

    def test_unknown_covariate(self):
        with pytest.raises(KeyError, match="no covariate 'arm'"):
            group_tests(records({"ke": [1.0, 2.0]}), {"1": {"wt": 1}, "2": {"wt": 2}}, "arm", "m")

    def test_too_few_per_group(self):
        t = group_tests(records({"ke": [1.0, 2.0, 3.0]}), {"1": {"g": "a"}, "2": {"g": "b"}, "3": {"g": "b"}}, "g", "m")
        assert t.loc["ke", "test"] == "too few subjects per group" and math.isnan(t.loc["ke", "p_exploratory"])
        t = group_tests(records({"ke": [1.0, 2.0]}), {"1": {"g": "a"}, "2": {"g": "a"}}, "g", "m")
        assert t.loc["ke", "test"] == "one group only"


class TestCorrelations:
    def test_spearman_against_scipy(self):
        """ρ and p equal scipy.stats.spearmanr; text covariates and constant ones are skipped;
        subjects missing a value are left out."""
        rng = np.random.default_rng(5)
        wt = rng.uniform(50, 90, 12)
        cl = 0.05 * (wt / 70) ** 0.75 * rng.lognormal(0, 0.2, 12)
        fits = records({"CL": list(cl)})
        cov = {str(i + 1): {"weight": float(wt[i]), "sex": "F" if i % 2 else "M", "site": 1} for i in range(12)}
        cov["12"]["weight"] = None
        c = covariate_correlations(fits, cov, "m")
        assert c["covariate"].tolist() == ["weight"]
        ref = stats.spearmanr(cl[:11], wt[:11])
        assert c.loc[0, "n"] == 11
        assert c.loc[0, "rho"] == pytest.approx(ref.statistic) and c.loc[0, "p_exploratory"] == pytest.approx(ref.pvalue)

    def test_monotone_relation(self):
        """A strictly increasing relation has ρ = 1 whatever its shape (rank correlation)."""
        fits = records({"V": [1.0, 8.0, 27.0, 64.0, 125.0]})
        cov = {str(i + 1): {"weight": float(i)} for i in range(5)}
        assert covariate_correlations(fits, cov, "m").loc[0, "rho"] == pytest.approx(1.0)


class TestDocuments:
    def test_fits_from_document(self):
        """The fields of a compartments.fit/1 document become records (null numbers as nan)."""
        doc = {"schema": "compartments.fit/1", "fits": [
            {"subject": "1", "model": "one-comp-oral", "status": "ok", "message": "", "aic": 12.5, "aicc": None,
             "bic": 14.0, "n_obs": 11, "parameters": {"ka": {"estimate": 1.5, "se": 0.2, "unit": "1/h"}},
             "derived": {"CL": {"value": 0.04, "se": None, "unit": "L/h"}}},
            {"subject": "2", "model": "one-comp-oral", "status": "failed", "message": "too few", "aic": None,
             "parameters": {}, "derived": {}}]}
        a, b = fits_from_document(doc, prefix="x:")
        assert a.subject == "x:1" and a.ok and a.estimates == {"ka": 1.5} and a.units == {"ka": "1/h"}
        assert a.derived["CL"] == Quantity(0.04, "L/h") and math.isnan(a.aicc) and a.n_obs == 11
        assert not b.ok and b.message == "too few" and math.isnan(b.aic)

    def test_pool_runs(self):
        """Runs pooled for comparison keep their subjects apart and carry the run as a covariate."""
        fits, cov = pool_runs({"A": records({"ke": [0.1, 0.2]}), "B": records({"ke": [0.3, 0.4]})})
        assert [f.subject for f in fits] == ["A:1", "A:2", "B:1", "B:2"]
        t = group_tests(fits, cov, "run", "m", order=["B", "A"])
        assert t.loc["ke", "groups"] == "B (2), A (2)"
        assert t.loc["ke", "p_exploratory"] == pytest.approx(stats.mannwhitneyu([0.3, 0.4], [0.1, 0.2]).pvalue)
        assert as_record(fits[0]) == fits[0]

    def test_summary_frame_is_plain_data(self):
        """Summary cells are numbers and strings only (CSV- and JSON-friendly)."""
        s = parameter_summary(records({"ke": [0.1, 0.2, 0.3]}), "m")
        for v in s.reset_index().iloc[0].tolist():
            assert isinstance(v, (str, int, float, np.integer, np.floating)), type(v)
        assert isinstance(pd.DataFrame(s).to_csv(), str)
