"""pytest plugin (entry point pytest11): the `near_roof` fixture asserts code stays near its roof.

    def test_add_streams(near_roof):
        near_roof(lambda: np.add(a, b, out=c), flops=a.size, bytes=3 * a.nbytes, dtype="fp64",
                  min_efficiency=0.3)

The store is `--eaves-db URL`, else the ini option `eaves_db`, else $EAVES_DB or
results/eaves.db. A test that asks for `near_roof` on a host with no stored survey errors at
setup with one line that says how to make one: it never passes silently.
"""

from __future__ import annotations

import pytest


def pytest_addoption(parser) -> None:
    group = parser.getgroup("eaves", "eaves roof checks")
    group.addoption("--eaves-db", metavar="URL", default=None,
                    help="store with this host's survey for the near_roof fixture")
    parser.addini("eaves_db", "store with this host's survey for the near_roof fixture", default="")


@pytest.fixture(scope="session")
def _eaves_host_model(request):
    """This host's roofs, looked up once per session (or the one-line reason there are none)."""
    from eaves.expect import NoCeilings, host_model

    db = request.config.getoption("--eaves-db") or request.config.getini("eaves_db") or None
    try:
        return host_model(db)
    except NoCeilings as err:
        return err


@pytest.fixture
def near_roof(_eaves_host_model):
    """A function: near_roof(fn, min_efficiency=..., flops=..., bytes=... | kind=..., shape=...)."""
    from eaves.expect import NoCeilings, check_roof

    if isinstance(_eaves_host_model, NoCeilings):
        pytest.fail(str(_eaves_host_model), pytrace=False)

    def check(fn, min_efficiency: float = 0.5, **counts):
        result = check_roof(fn, min_efficiency, model=_eaves_host_model, **counts)
        if not result.passed:
            pytest.fail(result.message(), pytrace=False)
        return result

    return check
