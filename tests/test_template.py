"""Tests for template files: the shipped library, the loader and validation.

Outside references are named beside each check. Hand-built sympy expressions are the
reference for every equation.
"""

from __future__ import annotations

import builtins
import math
import os
import pickle
import subprocess
import time
from pathlib import Path

import pytest
import sympy as sp

from compartments.errors import TemplateError
from compartments.library import (
    ENV_VAR,
    list_templates,
    load_template,
    parse_template,
    read_template,
    scan_templates,
    shipped_dir,
    template_dirs,
)
from compartments.template import FrozenMap, Template

HANG_GUARD_S = 5.0  # a hang detector, not a speed test

SHIPPED = {
    # name: (states, parameters)
    "one-comp-iv": (("central",), ("ke", "V")),
    "one-comp-infusion": (("central",), ("ke", "V")),
    "one-comp-oral": (("depot", "central"), ("ka", "ke", "V", "tlag")),
    "two-comp-iv": (("central", "peripheral"), ("k10", "k12", "k21", "V1")),
    "two-comp-oral": (
        ("depot", "central", "peripheral"),
        ("ka", "k10", "k12", "k21", "V1", "tlag"),
    ),
    "one-comp-mm": (("central",), ("Vmax", "Km", "V")),
    "transit-oral": (("depot", "transit1", "transit2", "transit3", "central"), ("ktr", "ke", "V")),
    "predator-prey": (
        ("prey", "predator"),
        ("alpha", "beta", "delta", "gamma", "prey0", "predator0"),
    ),
    "sir": (("S", "I", "R"), ("beta", "gamma", "I0")),
    "enzyme-substrate": (("S",), ("Vmax", "Km", "S0")),
}


def sym(*names: str) -> list[sp.Symbol]:
    return [sp.Symbol(n, real=True) for n in names]


def at_defaults(template: Template, expr: sp.Expr) -> float:
    values = {sp.Symbol(p.name, real=True): p.default for p in template.parameters}
    return float(expr.subs(values))


@pytest.fixture(autouse=True)
def _no_env(monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.delenv(ENV_VAR, raising=False)


# ---------------------------------------------------------------- shipped library


class TestShipped:
    """Every shipped template loads and has the promised names and structure."""

    @pytest.mark.parametrize("name", sorted(SHIPPED))
    def test_loads_with_expected_names(self, name: str) -> None:
        """States and parameters are exactly those promised, in order."""
        t = load_template(name)
        states, params = SHIPPED[name]
        assert t.name == name
        assert t.state_names == states
        assert t.parameter_names == params
        assert tuple(t.equations) == t.state_names
        assert t.source is not None and Path(t.source).stem == name
        assert t.description and t.note.strip()
        assert t.observables

    @pytest.mark.parametrize("name", sorted(SHIPPED))
    def test_parameters_are_sensible(self, name: str) -> None:
        """Estimated parameters have wide bounds (>= 2 orders) and log scale when positive."""
        for p in load_template(name).parameters:
            assert p.lower < p.default < p.upper or p.fixed
            if not p.fixed:
                assert p.log and p.upper / p.lower >= 100, p.name

    def test_listing_finds_all_shipped(self) -> None:
        """list_templates returns each shipped template once."""
        names = [t.name for t in list_templates()]
        assert sorted(names) == sorted(SHIPPED)

    def test_shipped_dir_is_the_package_folder(self) -> None:
        """The shipped folder is found through the installed package."""
        assert (shipped_dir() / "sir.toml").is_file()
        assert template_dirs()[-1] == shipped_dir()

    def test_pk_units(self) -> None:
        """PK templates use h, mg, L and mg/L."""
        for name in SHIPPED:
            t = load_template(name)
            if t.kind != "pk":
                continue
            assert t.time_unit == "h"
            assert all(s.unit == "mg" for s in t.states)
            assert t.observable("concentration").unit == "mg/L"

    def test_one_comp_oral(self) -> None:
        """Equations, oral lag and derived quantities of the one-compartment oral model."""
        t = load_template("one-comp-oral")
        ka, ke, V, depot, central = sym("ka", "ke", "V", "depot", "central")
        assert t.equations["depot"] == -ka * depot
        assert t.equations["central"] == ka * depot - ke * central
        assert t.observable("concentration").expression == central / V
        dose = t.doses["oral"]
        assert (dose.state, dose.lag, dose.bioavailability) == ("depot", "tlag", 1)
        tlag = t.parameter("tlag")
        assert (tlag.default, tlag.lower, tlag.upper, tlag.log, tlag.fixed) == (
            0,
            0,
            24,
            False,
            True,
        )
        derived = {d.name: d.expression for d in t.derived}
        assert derived["CL"] == ke * V
        assert derived["half_life"] == sp.log(2) / ke
        assert derived["absorption_half_life"] == sp.log(2) / ka
        assert set(t.doses) == {"oral"}

    def test_one_comp_iv_half_life_value(self) -> None:
        """t1/2 = ln 2 / ke: 6.931 h at ke = 0.1 /h (common practice)."""
        t = load_template("one-comp-iv")
        half = next(d for d in t.derived if d.name == "half_life").expression
        (ke,) = sym("ke")
        assert float(half.subs(ke, 0.1)) == pytest.approx(6.931471805599453)
        assert set(t.doses) == {"iv", "infusion"}
        assert set(load_template("one-comp-infusion").doses) == {"iv", "infusion"}

    @pytest.mark.parametrize("name", ["two-comp-iv", "two-comp-oral"])
    def test_two_comp_hybrid_constants(self, name: str) -> None:
        """alpha + beta = k10 + k12 + k21 and alpha*beta = k10*k21.

        Source: Gibaldi & Perrier, Pharmacokinetics, 2nd ed. (1982), ch. 2, the
        two-compartment model's hybrid rate constants (recalled from memory).
        """
        t = load_template(name)
        d = {x.name: x.expression for x in t.derived}
        k10, k12, k21, V1 = sym("k10", "k12", "k21", "V1")
        for values in ({k10: 0.2, k12: 0.5, k21: 0.3}, {k10: 1.7, k12: 0.04, k21: 3.0}):
            alpha, beta = float(d["alpha"].subs(values)), float(d["beta"].subs(values))
            assert alpha > beta > 0
            assert alpha + beta == pytest.approx(sum(values.values()))
            assert alpha * beta == pytest.approx(values[k10] * values[k21])
            assert float(d["half_life_beta"].subs(values)) == pytest.approx(math.log(2) / beta)
            assert float(d["half_life_alpha"].subs(values)) == pytest.approx(math.log(2) / alpha)
        assert d["CL"] == k10 * V1
        assert d["V2"] == V1 * k12 / k21
        assert sp.simplify(d["Vss"] - (V1 + d["V2"])) == 0

    def test_two_comp_reduces_to_one_comp(self) -> None:
        """With k12 = 0 and an empty periphery, two-comp-iv is one-comp-iv (ke = k10)."""
        t = load_template("two-comp-iv")
        k10, k12, central, peripheral = sym("k10", "k12", "central", "peripheral")
        rhs = t.equations["central"].subs({k12: 0, peripheral: 0})
        assert rhs == -k10 * central
        assert t.equations["peripheral"].subs({k12: 0, peripheral: 0}) == 0

    def test_michaelis_menten_low_concentration_limit(self) -> None:
        """Far below Km elimination is first order with CL = Vmax/Km (common practice)."""
        t = load_template("one-comp-mm")
        Vmax, Km, V, central = sym("Vmax", "Km", "V", "central")
        assert (
            sp.simplify(t.equations["central"] - (-Vmax * (central / V) / (Km + central / V))) == 0
        )
        slope = sp.limit(t.equations["central"] / central, central, 0)
        cl_low = next(d for d in t.derived if d.name == "CL_low").expression
        assert sp.simplify(slope - (-cl_low / V)) == 0

    def test_transit_chain_default(self) -> None:
        """Three transit states with rate ktr; MTT = (n+1)/ktr.

        Source: Savic et al., J Pharmacokinet Pharmacodyn 34 (2007) 711, ktr = (n+1)/MTT.
        """
        t = load_template("transit-oral")
        ktr, ke, depot, central, *tr = sym(
            "ktr", "ke", "depot", "central", "transit1", "transit2", "transit3"
        )
        assert t.settings == {"n_transit": 3}
        assert t.equations["depot"] == -ktr * depot
        assert t.equations["transit1"] == ktr * depot - ktr * tr[0]
        assert t.equations["transit2"] == ktr * tr[0] - ktr * tr[1]
        assert t.equations["transit3"] == ktr * tr[1] - ktr * tr[2]
        assert t.equations["central"] == ktr * tr[2] - ke * central
        mtt = next(d for d in t.derived if d.name == "MTT").expression
        assert mtt == 4 / ktr
        total = sum(t.equations[s] for s in t.state_names[:-1])
        assert sp.simplify(total + ktr * tr[2]) == 0  # mass leaves the chain only into central

    def test_transit_setting_override(self) -> None:
        """n_transit = 5 gives five transit states and MTT = 6/ktr."""
        t = load_template("transit-oral", settings={"n_transit": 5})
        transit = [s for s in t.state_names if s.startswith("transit")]
        assert transit == [f"transit{k}" for k in range(1, 6)]
        ktr, ke, central, t5 = sym("ktr", "ke", "central", "transit5")
        assert t.equations["central"] == ktr * t5 - ke * central
        assert next(d for d in t.derived if d.name == "MTT").expression == 6 / ktr
        assert t.settings["n_transit"] == 5

    @pytest.mark.parametrize("value", [0, 51, 2.5, -1, True, "3", math.nan])
    def test_transit_bad_override(self, value: object) -> None:
        """A chain length that is not a whole number in 1..50 is refused."""
        with pytest.raises(TemplateError, match="n_transit|finite number"):
            load_template("transit-oral", settings={"n_transit": value})

    def test_unknown_setting_override(self) -> None:
        """Overriding a setting the template does not have names the real ones."""
        with pytest.raises(TemplateError, match="unknown setting 'n'.*n_transit"):
            load_template("transit-oral", settings={"n": 4})
        with pytest.raises(TemplateError, match="unknown setting '__import__'.*none"):
            load_template("one-comp-iv", settings={"__import__": 1})

    def test_sir(self) -> None:
        """SIR conserves the population; R0 = beta/gamma (Kermack-McKendrick; common practice)."""
        t = load_template("sir")
        S, I_, R, beta, gamma, I0 = sym("S", "I", "R", "beta", "gamma", "I0")
        assert t.time_unit == "day"
        assert t.equations["S"] == -beta * S * I_ / 1000
        assert t.equations["I"] == beta * S * I_ / 1000 - gamma * I_
        assert t.equations["R"] == gamma * I_
        assert sp.simplify(sum(t.equations.values())) == 0
        assert [s.initial for s in t.states] == [1000 - I0, I0, 0]
        d = {x.name: x.expression for x in t.derived}
        assert d["R0"] == beta / gamma
        assert d["infectious_period"] == 1 / gamma
        assert t.observable("infected").expression == I_
        small = load_template("sir", settings={"population": 763})
        assert small.states[0].initial == 763 - I0
        assert small.equations["S"] == -beta * S * I_ / 763

    def test_predator_prey(self) -> None:
        """Both rates vanish at prey = gamma/delta, predator = alpha/beta (Lotka-Volterra)."""
        t = load_template("predator-prey")
        prey, predator, alpha, beta, delta, gamma = sym(
            "prey", "predator", "alpha", "beta", "delta", "gamma"
        )
        assert t.equations["prey"] == alpha * prey - beta * prey * predator
        assert t.equations["predator"] == delta * prey * predator - gamma * predator
        eq = {prey: gamma / delta, predator: alpha / beta}
        assert all(sp.simplify(rhs.subs(eq)) == 0 for rhs in t.equations.values())
        assert t.observable_names == ("prey", "predator")
        assert [s.initial for s in t.states] == sym("prey0", "predator0")
        assert dict(t.doses) == {}
        assert t.time_unit == "day"

    def test_enzyme_substrate(self) -> None:
        """Michaelis-Menten substrate depletion; the initial rate is the rate at S0."""
        t = load_template("enzyme-substrate")
        S, Vmax, Km, S0 = sym("S", "Vmax", "Km", "S0")
        assert t.equations["S"] == -Vmax * S / (Km + S)
        assert t.time_unit == "min"
        assert t.states[0].initial == S0
        d = {x.name: x.expression for x in t.derived}
        assert sp.simplify(d["initial_rate"] + t.equations["S"].subs(S, S0)) == 0
        assert t.observable("substrate").expression == S

    def test_template_pickles_and_hashes(self) -> None:
        """Templates travel to worker processes and can be dictionary keys."""
        t = load_template("transit-oral", settings={"n_transit": 4})
        back = pickle.loads(pickle.dumps(t))
        assert back == t
        assert hash(back) == hash(t)
        assert isinstance(t.equations, FrozenMap)
        with pytest.raises(TypeError):
            t.equations["depot"] = 0  # type: ignore[index]


# ------------------------------------------------------------------------ loader


def _copy_shipped(name: str, folder: Path, **replace: str) -> Path:
    text = (shipped_dir() / f"{name}.toml").read_text(encoding="utf-8")
    for old, new in replace.items():
        text = text.replace(old, new)
    path = folder / f"{name}.toml"
    path.write_text(text, encoding="utf-8")
    return path


class TestLoader:
    """Search order, user folders, the environment variable and friendly failures."""

    def test_user_folder_shadows_shipped(self, tmp_path: Path) -> None:
        """A template in a folder given with search= wins over the shipped one."""
        path = _copy_shipped("one-comp-oral", tmp_path, **{"default = 30.0": "default = 42.0"})
        t = load_template("one-comp-oral", search=[tmp_path])
        assert t.source == str(path)
        assert t.parameter("V").default == 42.0
        assert load_template("one-comp-oral").parameter("V").default == 30.0

    def test_environment_folder(self, tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
        """Folders in COMPARTMENTS_TEMPLATES are searched after search= and before shipped."""
        env_dir, user_dir = tmp_path / "env", tmp_path / "user"
        env_dir.mkdir()
        user_dir.mkdir()
        _copy_shipped("sir", env_dir, **{"population = 1000": "population = 500"})
        monkeypatch.setenv(ENV_VAR, os.pathsep.join([str(tmp_path / "missing"), str(env_dir)]))
        assert load_template("sir").settings["population"] == 500
        _copy_shipped("sir", user_dir, **{"population = 1000": "population = 200"})
        assert load_template("sir", search=[user_dir]).settings["population"] == 200
        dirs = template_dirs([user_dir])
        assert dirs == [user_dir, env_dir, shipped_dir()]

    def test_missing_search_folder(self, tmp_path: Path) -> None:
        """A user folder that does not exist is an error naming it."""
        with pytest.raises(TemplateError, match="does not exist") as info:
            load_template("sir", search=[tmp_path / "nope"])
        assert info.value.path == str(tmp_path / "nope")

    def test_load_by_path(self, tmp_path: Path) -> None:
        """A path to a .toml file loads that file, as str or Path."""
        path = _copy_shipped("sir", tmp_path)
        assert load_template(str(path)).source == str(path)
        assert load_template(path).name == "sir"
        assert read_template(path, settings={"population": 10}).settings == {"population": 10}

    def test_unknown_name_suggests(self) -> None:
        """A misspelt name lists close matches and how to list templates."""
        with pytest.raises(TemplateError) as info:
            load_template("one-comp-orall")
        message = str(info.value)
        assert "unknown template 'one-comp-orall'" in message
        assert "'one-comp-oral'" in message
        assert "list_templates()" in message

    @pytest.mark.parametrize("name", ["../secrets", "/etc/passwd", "a b", ""])
    def test_odd_names(self, name: str) -> None:
        """Names with path parts are treated as paths; others must be plain names."""
        with pytest.raises(TemplateError):
            load_template(name)

    def test_name_must_match_file(self, tmp_path: Path) -> None:
        """A file whose name key differs from its stem is refused."""
        path = tmp_path / "mine.toml"
        path.write_text((shipped_dir() / "sir.toml").read_text(encoding="utf-8"), encoding="utf-8")
        with pytest.raises(TemplateError, match="differs from the file name 'mine'"):
            load_template(path)

    def test_broken_user_template_does_not_hide_the_rest(self, tmp_path: Path) -> None:
        """scan_templates reports a broken file and still lists every other template."""
        _copy_shipped("sir", tmp_path, **{"[equations]": "[equationz]"})
        _copy_shipped("enzyme-substrate", tmp_path, **{"default = 0.1": "default = 0.2"})
        templates, errors = scan_templates([tmp_path])
        assert len(errors) == 1 and errors[0].path == str(tmp_path / "sir.toml")
        names = sorted(t.name for t in templates)
        assert names == sorted(set(SHIPPED) - {"sir"})
        mine = next(t for t in templates if t.name == "enzyme-substrate")
        assert mine.parameter("Vmax").default == 0.2
        with pytest.warns(UserWarning, match="sir.toml"):
            assert len(list_templates([tmp_path])) == len(SHIPPED) - 1

    def test_not_utf8(self, tmp_path: Path) -> None:
        """A file that is not UTF-8 is refused with its line."""
        path = tmp_path / "bad.toml"
        path.write_bytes(b'name = "bad"\n# \xff\xfe\n')
        with pytest.raises(TemplateError, match="not UTF-8") as info:
            load_template(path)
        assert info.value.where == "line 2"

    def test_missing_file(self, tmp_path: Path) -> None:
        """A path that does not exist is named in the error."""
        with pytest.raises(TemplateError, match="not found") as info:
            load_template(tmp_path / "none.toml")
        assert info.value.path == str(tmp_path / "none.toml")


# -------------------------------------------------------------------- validation

BASE = """\
name = "bad"
description = "test model"
note = \"\"\"
ka = 3 inside a note is text, not a key
\"\"\"
kind = "pk"
time_unit = "h"

[settings]
n = 2

[states.depot]
unit = "mg"

[states.central]
unit = "mg"
initial = 0

[parameters.ka]
unit = "1/h"
default = 1.0
lower = 0.01
upper = 100.0

[parameters.ke]
unit = "1/h"
default = 0.1
lower = 0.001
upper = 10.0

[parameters.V]
unit = "L"
default = 30.0
lower = 0.1
upper = 3000.0

[parameters.tlag]
unit = "h"
default = 0.0
lower = 0.0
upper = 24.0
log = false
fixed = true

[equations]
depot = "-ka*depot"
central = "ka*depot - ke*central"

[doses.oral]
state = "depot"
lag = "tlag"

[observables.concentration]
expression = "central / V"
unit = "mg/L"

[derived.half_life]
expression = "log(2)/ke"
unit = "h"
"""

KA = 'unit = "1/h"\ndefault = 1.0\nlower = 0.01\nupper = 100.0\n'
CHAIN = '\n[chain]\nname = "transit"\ncount = "n"\nrate = "ka"\nfrom = "depot"\n'


def _sub(old: str, new: str) -> str:
    assert old in BASE, old
    return BASE.replace(old, new, 1)


# (id, text, words in the message, marker whose line must be reported or None)
# fmt: off
BAD = [
    ("toml-syntax", _sub("default = 1.0", "default = "), ["not valid TOML"], "default = \n"),
    ("toml-duplicate-key", _sub("upper = 100.0\n", "upper = 100.0\nupper = 5.0\n"), ["not valid TOML"], "upper = 5.0"),
    ("missing-key", _sub('time_unit = "h"\n', ""), ["missing required key 'time_unit'"], None),
    ("unknown-top-key", _sub('kind = "pk"', 'kind = "pk"\ncolour = "red"'), ["unknown key 'colour'", "allowed keys"], "colour"),
    ("unknown-param-key", _sub(KA, KA + "minimum = 0.5\n"), ["unknown key 'minimum'", "[parameters.ka]", "allowed keys: unit"], "minimum"),
    ("wrong-type", _sub("default = 1.0", 'default = "fast"'), ["must be a number", "text 'fast'"], 'default = "fast"'),
    ("wrong-type-bool", _sub("log = false", 'log = "no"'), ["true or false"], 'log = "no"'),
    ("wrong-type-table", _sub("[states.depot]\nunit = \"mg\"\n", "[states]\ndepot = \"mg\"\n"), ["[states.depot] must be a table"], 'depot = "mg"'),
    ("description-not-text", _sub('description = "test model"', "description = 5"), ["must be text", "integer 5"], "description = 5"),
    ("not-identifier", _sub("[parameters.ka]", "[parameters.2k]"), ["'2k' is not a valid name"], "[parameters.2k]"),
    ("underscore-name", _sub("[parameters.ka]", "[parameters._k]"), ["must not start with '_'"], "[parameters._k]"),
    ("reserved-function", _sub("[parameters.ka]", "[parameters.exp]"), ["'exp' is reserved"], "[parameters.exp]"),
    ("reserved-time", _sub('[states.depot]\nunit = "mg"', '[states.t]\nunit = "mg"'), ["'t' is reserved"], "[states.t]"),
    ("reserved-keyword", _sub("[parameters.ka]", "[parameters.lambda]"), ["'lambda' is reserved"], "[parameters.lambda]"),
    ("used-twice", BASE + '\n[derived.V]\nexpression = "ke"\nunit = "1/h"\n', ["'V' is used twice", "parameters.V", "derived.V"], "[derived.V]"),
    ("setting-twice", _sub("n = 2", "n = 2\nka = 2"), ["'ka' is used twice"], "[parameters.ka]"),
    ("observable-twice", _sub("[observables.concentration]", "[observables.ka]"), ["'ka' is used twice", "observables.ka"], "[observables.ka]"),
    ("undeclared-state-equation", _sub('central = "ka', 'periph = "-ke*periph"\ncentral = "ka'), ["undeclared state 'periph'"], "periph ="),
    ("state-without-equation", _sub('central = "ka*depot - ke*central"\n', ""), ["'central' has no equation"], "[equations]"),
    ("undeclared-name", _sub("ka*depot - ke*central", "ka*depot - kk*central"), ["unknown name 'kk'", "column 12", "declared names"], 'central = "ka*depot - kk'),
    ("unknown-function", _sub('"log(2)/ke"', '"ln(2)/ke"'), ["unknown function 'ln'"], '"ln(2)/ke"'),
    ("unknown-route", _sub("[doses.oral]", "[doses.subcutaneous]"), ["unknown route 'subcutaneous'", "iv, oral, infusion"], "[doses.subcutaneous]"),
    ("dose-unknown-state", _sub('state = "depot"', 'state = "gut"'), ["unknown state 'gut'"], 'state = "gut"'),
    ("lag-not-parameter", _sub('lag = "tlag"', 'lag = "delay"'), ["'delay' is not a parameter"], 'lag = "delay"'),
    ("lag-negative-bound", _sub("lower = 0.0\nupper = 24.0", "lower = -1.0\nupper = 24.0"), ["cannot be negative"], "lower = -1.0"),
    ("bioavailability-above-one", _sub('lag = "tlag"', 'lag = "tlag"\nbioavailability = 1.5'), ["(0, 1]"], "bioavailability"),
    ("lower-above-upper", _sub("lower = 0.01", "lower = 200.0"), ["lower (200) must be below upper (100)"], "lower = 200.0"),
    ("default-outside", _sub("default = 1.0", "default = 1000.0"), ["default 1000 is outside [0.01, 100]"], "default = 1000.0"),
    ("log-needs-positive", _sub("lower = 0.001", "lower = 0.0"), ["log = true", "lower > 0"], "lower = 0.0\nupper = 10.0"),
    ("non-finite-inf", _sub("upper = 100.0", "upper = inf"), ["finite", "inf"], "upper = inf"),
    ("non-finite-nan", _sub("default = 0.1", "default = nan"), ["finite", "nan"], "default = nan"),
    ("setting-not-number", _sub("n = 2", 'n = "two"'), ["settings.n must be a number"], 'n = "two"'),
    ("chain-count-not-setting", BASE + CHAIN.replace('"n"', '"m"'), ["chain count 'm' must name a setting"], 'count = "m"'),
    ("chain-count-fraction", _sub("n = 2", "n = 2.5") + CHAIN, ["whole number from 1 to 50"], 'count = "n"'),
    ("chain-count-too-long", _sub("n = 2", "n = 51") + CHAIN, ["whole number from 1 to 50"], 'count = "n"'),
    ("chain-count-zero", _sub("n = 2", "n = 0") + CHAIN, ["whole number from 1 to 50"], 'count = "n"'),
    ("chain-generated-equation", _sub('depot = "-ka*depot"', 'depot = "-ka*depot"\ntransit1 = "0"') + CHAIN, ["generated by [chain]"], "transit1 ="),
    ("chain-unknown-source", BASE + CHAIN.replace('"depot"', '"gut"'), ["chain source 'gut'"], 'from = "gut"'),
    ("hostile-import", _sub('"-ka*depot"', "\"__import__('os').system('touch SENTINEL')\""), ["'__'", "__import__", "column 1"], "depot = \"__import__"),
    ("hostile-attribute", _sub('"central / V"', '"central.__class__"'), ["attribute access", "column 8"], '"central.__class__"'),
    ("hostile-string", _sub('"log(2)/ke"', "\"open('x').read()\""), ["strings are not allowed"], "\"open("),
    ("hostile-lambda", _sub('"-ka*depot"', '"lambda: 0"'), ["keyword 'lambda'"], '"lambda: 0"'),
    ("power-tower", _sub('"-ka*depot"', '"9**9**9**9*depot"'), ["exponent"], '"9**9**9**9'),
    ("nested-too-deep", _sub('"-ka*depot"', '"' + "(" * 100 + "ka" + ")" * 100 + '*depot"'), ["nested too deeply"], 'depot = "((('),
    ("expression-table", _sub('"-ka*depot"', "{ a = 1 }"), ["must be an expression"], "depot = { a"),
    ("unknown-kind", _sub('kind = "pk"', 'kind = "pd"'), ["kind 'pd' is unknown", "pk, biology"], 'kind = "pd"'),
    ("unknown-time-unit", _sub('time_unit = "h"', 'time_unit = "fortnight"'), ["time_unit 'fortnight'"], "time_unit ="),
    ("unused-parameter", BASE + '\n[parameters.k2]\nunit = "1/h"\ndefault = 1.0\nlower = 0.1\nupper = 10.0\n', ["'k2' is not used"], "[parameters.k2]"),
    ("observable-without-state", _sub('"central / V"', '"1 / V"'), ["does not involve any state"], '"1 / V"'),
    ("negative-initial", _sub("initial = 0", "initial = -5"), ["non-negative", "-5"], "initial = -5"),
    ("derived-uses-state", _sub('"log(2)/ke"', '"central/ke"'), ["unknown name 'central'"], '"central/ke"'),
    ("unit-too-long", _sub('unit = "L"', 'unit = "' + "L" * 50 + '"'), ["limit is 40"], 'unit = "LLL'),
    ("huge-integer", _sub("default = 1.0", "default = " + "9" * 5000), ["not valid TOML"], None),
]
# fmt: on


def _line_of(text: str, marker: str) -> int:
    return text[: text.index(marker)].count("\n") + 1


class TestValidation:
    """Malformed or hostile templates are refused with the file and the line or key."""

    def test_base_is_valid(self, tmp_path: Path) -> None:
        """The template the battery mutates is itself valid."""
        path = tmp_path / "bad.toml"
        path.write_text(BASE, encoding="utf-8")
        assert load_template(path).state_names == ("depot", "central")
        path.write_text(BASE + CHAIN, encoding="utf-8")
        assert load_template(path).state_names == ("depot", "transit1", "transit2", "central")

    def test_battery_is_large(self) -> None:
        """At least twenty distinct malformed templates are checked."""
        assert len({case[0] for case in BAD}) >= 20

    @pytest.mark.parametrize(
        ("text", "words", "marker"), [c[1:] for c in BAD], ids=[c[0] for c in BAD]
    )
    def test_refused(self, tmp_path: Path, text: str, words: list[str], marker: str | None) -> None:
        """The error names the file, the line of the offending key and what is wrong."""
        path = tmp_path / "bad.toml"
        path.write_text(text, encoding="utf-8")
        start = time.perf_counter()
        with pytest.raises(TemplateError) as info:
            load_template(path)
        assert time.perf_counter() - start < HANG_GUARD_S
        err = info.value
        message = str(err)
        assert err.path == str(path)
        assert message.startswith(str(path))
        assert "\n" not in message
        for word in words:
            assert word in message, (word, message)
        if marker is not None:
            assert err.where is not None and err.where.startswith(
                f"line {_line_of(text, marker)}"
            ), (
                err.where,
                marker,
            )

    def test_where_names_the_key(self, tmp_path: Path) -> None:
        """Besides the line, the dotted key is named."""
        err = _refusal(tmp_path, _sub("default = 1.0", 'default = "x"'))
        assert err.where == f"line {_line_of(BASE, 'default = 1.0')}, parameters.ka.default"

    def test_parse_template_without_path(self) -> None:
        """parse_template works on text alone; errors then name only the place."""
        t = parse_template(BASE)
        assert t.source is None and t.name == "bad"
        with pytest.raises(TemplateError) as info:
            parse_template(_sub("ke*central", "kq*central"))
        assert info.value.path is None
        assert str(info.value).startswith("line ")


def _refusal(tmp_path: Path, text: str) -> TemplateError:
    path = tmp_path / "bad.toml"
    path.write_text(text, encoding="utf-8")
    with pytest.raises(TemplateError) as info:
        load_template(path)
    return info.value


class TestHostile:
    """Hostile templates run no code."""

    HOSTILE = [
        ("equations", '"-ka*depot"', "\"__import__('os').system('touch {s}')\""),
        ("initial", "initial = 0", "initial = \"__import__('os').system('touch {s}')\""),
        ("observable", '"central / V"', '"().__class__.__base__.__subclasses__()"'),
        ("derived", '"log(2)/ke"', "\"exec('import os; os.system(\\\\'touch {s}\\\\')')\""),
        ("bioavailability", 'lag = "tlag"', 'lag = "tlag"\nbioavailability = "eval(\'1\')"'),
        ("chain-rate", None, None),
    ]

    @pytest.mark.parametrize(("place", "old", "new"), HOSTILE, ids=[h[0] for h in HOSTILE])
    def test_no_code_runs(
        self,
        tmp_path: Path,
        monkeypatch: pytest.MonkeyPatch,
        place: str,
        old: str | None,
        new: str | None,
    ) -> None:
        """No sentinel file appears, os/subprocess are never imported or called."""
        sentinel = tmp_path / "pwned"
        if old is None:
            text = BASE + CHAIN.replace(
                'rate = "ka"', f"rate = \"__import__('os').system('touch {sentinel}')\""
            )
        else:
            text = _sub(old, new.format(s=sentinel))
        calls: list[str] = []
        real_import = builtins.__import__

        def guarded_import(name, *args, **kwargs):  # noqa: ANN001, ANN002, ANN003
            if name.split(".")[0] in {"os", "subprocess", "posix", "shutil", "pty"}:
                calls.append(name)
                raise AssertionError(f"import of {name} during template parsing")
            return real_import(name, *args, **kwargs)

        def forbidden(*args, **kwargs):  # noqa: ANN002, ANN003
            calls.append("call")
            raise AssertionError("a command was run")

        with pytest.raises(TemplateError):
            with monkeypatch.context() as m:
                m.setattr(builtins, "__import__", guarded_import)
                m.setattr(os, "system", forbidden)
                m.setattr(subprocess, "Popen", forbidden)
                parse_template(text, path="hostile.toml")
        assert calls == []
        assert not sentinel.exists()


class TestResources:
    """Resource-exhausting files are refused quickly and without reading them whole."""

    def test_huge_file_refused_by_size(
        self, tmp_path: Path, monkeypatch: pytest.MonkeyPatch
    ) -> None:
        """A 50 MB file is refused from its size; its text is never parsed."""
        path = tmp_path / "big.toml"
        with open(path, "wb") as handle:
            handle.write(b'name = "big"\n')
            handle.truncate(50_000_000)
        read: list[int] = []
        real_open = builtins.open

        def spy_open(file, *args, **kwargs):  # noqa: ANN001, ANN002, ANN003
            if str(file) == str(path):
                read.append(1)
            return real_open(file, *args, **kwargs)

        monkeypatch.setattr(builtins, "open", spy_open)
        start = time.perf_counter()
        with pytest.raises(TemplateError, match=r"50\.0 MB; the limit is 1 MB") as info:
            load_template(path)
        assert time.perf_counter() - start < HANG_GUARD_S
        assert info.value.path == str(path)
        assert read == []

    def test_huge_text_refused(self) -> None:
        """parse_template refuses text over 1 MB before parsing it."""
        with pytest.raises(TemplateError, match="larger than 1 MB"):
            parse_template("#" * 1_000_001)

    def test_five_thousand_states(self, tmp_path: Path) -> None:
        """5 000 states are refused by count, naming the limit."""
        states = "".join(f'[states.s{i}]\nunit = "mg"\n' for i in range(5000))
        text = _sub('[states.depot]\nunit = "mg"\n', states)
        start = time.perf_counter()
        err = _refusal(tmp_path, text)
        assert time.perf_counter() - start < HANG_GUARD_S
        assert "5001 entries; the limit is 200" in str(err)
        assert err.where is not None and err.where.startswith(
            f"line {_line_of(text, '[states.s0]')}"
        )

    def test_five_thousand_parameters(self, tmp_path: Path) -> None:
        """5 000 parameters are refused by count."""
        params = "".join(
            f'[parameters.p{i}]\nunit = "1"\ndefault = 1\nlower = 0.1\nupper = 10\n'
            for i in range(5000)
        )
        start = time.perf_counter()
        err = _refusal(tmp_path, BASE + params)
        assert time.perf_counter() - start < HANG_GUARD_S
        assert "the limit is 200" in str(err)

    def test_five_thousand_nested_parentheses(self, tmp_path: Path) -> None:
        """An equation with 5 000 nested parentheses is refused by length."""
        text = _sub('"-ka*depot"', '"' + "(" * 5000 + "ka" + ")" * 5000 + '*depot"')
        start = time.perf_counter()
        err = _refusal(tmp_path, text)
        assert time.perf_counter() - start < HANG_GUARD_S
        assert "limit is 2000" in str(err) and "equations.depot" in str(err)

    def test_deeply_nested_toml(self, tmp_path: Path) -> None:
        """TOML arrays nested 100 000 deep are refused, not a crash."""
        start = time.perf_counter()
        err = _refusal(tmp_path, "x = " + "[" * 100_000 + "\n")
        assert time.perf_counter() - start < HANG_GUARD_S
        assert "nested too deeply" in str(err)

    def test_power_tower_equation(self, tmp_path: Path) -> None:
        """9**9**9**9 in an equation is refused at once."""
        start = time.perf_counter()
        err = _refusal(tmp_path, _sub('"-ka*depot"', '"-ka*depot*9**9**9**9"'))
        assert time.perf_counter() - start < HANG_GUARD_S
        assert "exponent" in str(err)
