"""The ``design`` command and the identifiability answer of ``show``."""

from __future__ import annotations

import json

import pytest
from cli_run import run

from compartments.report.design import DESIGN_CAUTIONS


class TestDesignCommand:
    def test_design_json_and_plot(self, tmp_path, capsys):
        """The Box & Lucas design (1959) printed, written as JSON and drawn."""
        out, fig = tmp_path / "design.json", tmp_path / "design.png"
        rc = run(["design", "one-comp-oral", "-p", "ka=0.7", "-p", "ke=0.2", "--fix", "V=1", "--samples", "2",
                  "--window", "0:24", "--compare", "0.5,2,8", "--json", out, "--plot", fig])
        assert rc == 0
        text = capsys.readouterr().out
        assert "1.23, 6.86" in text and "research use" in text
        doc = json.loads(out.read_text())
        assert [round(t, 2) for t in doc["design"]["groups"][0]["times"]] == [1.23, 6.86]
        assert doc["compared"][0]["times"] == "0.5,2,8" and doc["cautions"] == list(DESIGN_CAUTIONS)
        assert fig.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"

    def test_population_design(self, capsys):
        """--subjects with --variability gives a population design with variance precision."""
        rc = run(["design", "one-comp-oral", "-p", "ka=0.7", "-p", "ke=0.2", "-p", "V=10", "--samples", "3",
                  "--subjects", "60", "--variability", "ka=0.3,ke=0.3,V=0.2"])
        assert rc == 0
        text = capsys.readouterr().out
        assert "population" in text and "RSE % of its variance" in text

    @pytest.mark.parametrize("argv, match", [
        (["--window", "24"], "--window '24'"),
        (["--group", "30"], "--group '30'"),
        (["--variability", "ka=0.3"], "--variability needs --subjects"),
        (["--plot", "out.svg"], "ending in .png"),
        (["-p", "CL=3"], "not a parameter"),
    ])
    def test_bad_options(self, argv, match, capsys):
        """Bad options end as one line and exit code 2, with nothing written."""
        rc = run(["design", "one-comp-oral", "--samples", "2"] + argv)
        err = capsys.readouterr().err
        assert rc == 2
        assert match in err and len(err.strip().splitlines()) == 1

    def test_samples_required(self, capsys):
        """Without --samples or --group the command says what is missing."""
        assert run(["design", "one-comp-oral"]) == 2
        assert "--samples" in capsys.readouterr().err


class TestShowIdentifiability:
    def test_predator_prey_prey_only(self, capsys):
        """show --observe prey says beta and predator0 are not identifiable, only their
        product (worked by hand in test_identifiability)."""
        assert run(["show", "predator-prey", "--observe", "prey"]) == 0
        text = capsys.readouterr().out
        assert "structural identifiability" in text
        assert "beta*predator0" in text

    def test_flip_flop(self, capsys):
        """show one-comp-oral --route oral reports the two flip-flop solutions."""
        assert run(["show", "one-comp-oral", "--route", "oral"]) == 0
        assert "locally: 2 values" in capsys.readouterr().out

    def test_unknown_route(self, capsys):
        """A route the template lacks is one line with the routes it has."""
        assert run(["show", "one-comp-oral", "--route", "iv"]) == 2
        err = capsys.readouterr().err
        assert "--route iv" in err and "oral" in err
