"""Collection settings for the whole repository (the tests' own fixtures are in tests/conftest.py).

The docstring Examples of pipeline/ run as doctests (``--doctest-modules`` and
``testpaths`` in pyproject.toml). An Example known to fail is listed here with
its owner's note and marked as an expected failure (strict: once it passes,
the entry must go).
"""

import pytest

KNOWN_FAILING_DOCTESTS = {}


def pytest_collection_modifyitems(items):
    for item in items:
        reason = KNOWN_FAILING_DOCTESTS.get(item.name)
        if reason and type(item).__name__ == "DoctestItem":
            item.add_marker(pytest.mark.xfail(reason=reason, strict=True))
