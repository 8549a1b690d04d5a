"""What a results folder records about the machine: package versions as the packages
themselves report them, and "not installed" for one that is missing."""

from __future__ import annotations

import os
import platform

import numpy
import optuna
import pandas
import scipy
import torch

from kablate.trials import environment as env_module
from kablate.trials.environment import environment


def public(version: str) -> str:
    """A version without its PEP 440 local label ("2.14.1+cu130" → "2.14.1"): a wheel's
    ``__version__`` may carry one that its installed metadata does not."""
    return version.split("+")[0]


def test_package_versions_are_what_the_imported_packages_report():
    packages = environment()["packages"]
    for name, module in (
        ("torch", torch),
        ("numpy", numpy),
        ("pandas", pandas),
        ("scipy", scipy),
        ("optuna", optuna),
    ):
        assert public(packages[name]) == public(module.__version__), name


def test_a_missing_package_is_said_to_be_missing(monkeypatch):
    monkeypatch.setattr(env_module, "PACKAGES", ("torch", "kablate-no-such-package"))
    packages = environment()["packages"]
    assert list(packages) == ["torch", "kablate-no-such-package"]
    assert public(packages["torch"]) == public(torch.__version__)
    assert packages["kablate-no-such-package"] == "not installed"


def test_the_machine_is_described_by_the_standard_library():
    found = environment()
    assert found["cores"] == os.cpu_count()
    assert found["python"] == platform.python_version()
    assert found["cpu"] and found["cpu"] != "unknown CPU"
