"""Shared fixtures."""

import pytest


@pytest.fixture(params=["operation", "graph"])
def tree_form(request, monkeypatch):
    """Build models with the whitened tree map as one operation and as its PyTensor form."""
    monkeypatch.setenv("ALLOLAW_WHITENED_TREE", request.param)
    return request.param
