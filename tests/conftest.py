"""Shared helpers: fixture paths and running the CLI in-process."""
from __future__ import annotations

import contextlib
import io
from pathlib import Path

import pytest

FIXTURES = Path(__file__).resolve().parent.parent / "fixtures"


@pytest.fixture
def fixtures() -> Path:
    return FIXTURES


@pytest.fixture
def cli():
    """Run ``labeler ARGS`` in-process; returns (exit code, stdout, stderr)."""
    from labeler.cli import main

    def run(*args: str):
        out, err = io.StringIO(), io.StringIO()
        with contextlib.redirect_stdout(out), contextlib.redirect_stderr(err):
            try:
                code = main([str(a) for a in args])
            except SystemExit as exc:  # argparse usage errors
                code = exc.code
        return code, out.getvalue(), err.getvalue()
    return run


@pytest.fixture
def hashing():
    from labeler.embed import HashingEmbedder
    return HashingEmbedder(128)
