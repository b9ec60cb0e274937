"""Fixtures shared by the test modules: store URLs on every backend, a fresh SQLite store, the store
commands run in-process, and a working folder of one's own."""

from __future__ import annotations

from pathlib import Path
from typing import Callable, Iterator

import pytest
from store_backends import BACKENDS, backend_url

from eaves.store import Store


@pytest.fixture(params=BACKENDS)
def store_url(request: pytest.FixtureRequest, tmp_path: Path) -> Iterator[str]:
    """An empty store, once per backend (PostgreSQL: see store_backends.pg_base_url)."""
    with backend_url(request.param, tmp_path) as url:
        yield url


@pytest.fixture
def store(tmp_path: Path) -> Store:
    """A fresh SQLite store in the test's own folder."""
    return Store(f"sqlite:///{tmp_path / 'store.db'}")


@pytest.fixture
def run_cli(monkeypatch: pytest.MonkeyPatch,
            capsys: pytest.CaptureFixture[str]) -> Callable[..., tuple[int, str, str]]:
    """`eaves ...` in-process, limited to the store commands so that other modules cannot break it."""
    from eaves import cli

    monkeypatch.setattr(cli, "COMMANDS", ("db", "push", "merge"))

    def run(*argv: str) -> tuple[int, str, str]:
        code = cli.main(list(argv))
        out, err = capsys.readouterr()
        return code, out, err

    return run


@pytest.fixture
def place(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> Path:
    """The test's folder as the working directory, with the spool in it: results/ lands there."""
    monkeypatch.chdir(tmp_path)
    monkeypatch.setenv("EAVES_SPOOL", str(tmp_path / "spool.db"))
    return tmp_path
