"""Shared fixtures: a small valid fine field, and how to run the command line as a subprocess."""

from __future__ import annotations

import os
import sys
from pathlib import Path

import numpy as np
import pytest
import xarray as xr

from upscale.io.schema import fine_dataset

PROJECT_ROOT = Path(__file__).resolve().parents[1]
SMALL_SHAPE = (6, 6, 6)


def small_fine_dataset(shape=SMALL_SHAPE, seed: int = 11) -> xr.Dataset:
    """A small valid fine field in the schema: lognormal kx = ky, kz = kx / 10, all cells active."""
    rng = np.random.default_rng(seed)
    kx = np.exp(rng.normal(np.log(100.0), 1.0, shape))
    porosity = np.clip(rng.normal(0.2, 0.03, shape), 0.05, 0.35)
    ntg = np.full(shape, 0.9)
    active = np.ones(shape, dtype=np.int8)
    nx, ny, nz = shape
    return fine_dataset(kx, kx.copy(), kx / 10.0, porosity, dx=np.full(nx, 20.0), dy=np.full(ny, 10.0),
                        dz=np.full(nz, 2.0), ntg=ntg, active=active)


@pytest.fixture(scope="session")
def small_fine_factory():
    """The function that builds the small valid fine field: ``factory(shape=(6, 6, 6), seed=11)``.

    For module- or session-scoped set-ups that cannot use the function-scoped fixtures.
    """
    return small_fine_dataset


@pytest.fixture
def small_fine() -> xr.Dataset:
    """A fresh small valid fine field (6 x 6 x 6) as an xarray Dataset (safe to modify)."""
    return small_fine_dataset()


@pytest.fixture
def fine_file(tmp_path, small_fine) -> Path:
    """The small valid fine field written to ``tmp_path / 'fine.nc'``."""
    path = tmp_path / "fine.nc"
    small_fine.to_netcdf(path, engine="netcdf4")
    return path


@pytest.fixture(scope="session")
def cli_env() -> dict:
    """Environment for CLI subprocesses: the project importable wherever the subprocess runs."""
    env = dict(os.environ)
    env["PYTHONPATH"] = os.pathsep.join(p for p in (str(PROJECT_ROOT), env.get("PYTHONPATH")) if p)
    env.pop("PYTHONWARNINGS", None)
    return env


@pytest.fixture(scope="session")
def cli_command() -> list[str]:
    """The command prefix that runs the command line: ``python -m upscale.cli``."""
    return [sys.executable, "-m", "upscale.cli"]
