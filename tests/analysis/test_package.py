"""The analysis package re-exports its names lazily: each one still resolves to its home."""

from __future__ import annotations

import importlib

import kablate.analysis as analysis


def test_every_exported_name_is_the_object_its_module_defines():
    for name in analysis.__all__:
        home = importlib.import_module(f"kablate.analysis.{analysis.HOMES[name]}")
        assert getattr(analysis, name) is getattr(home, name)
        assert name in vars(home)  # defined there, not merely re-imported
