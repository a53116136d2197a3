"""``phasewatch serve`` prints the sign-in link with the token only to a terminal, so the
token never lands in a log (systemd's journal, a redirected file)."""

from __future__ import annotations

import io
import os
import sys
from pathlib import Path
from types import SimpleNamespace

import pytest

from daemon.web.app import _greet
from daemon.web.auth import load_or_create_token


def _config(data: Path) -> SimpleNamespace:
    return SimpleNamespace(profile=SimpleNamespace(scope=SimpleNamespace(name="bench")), data_dir=data, host="127.0.0.1")


def test_link_with_token_goes_to_a_terminal(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    token, _ = load_or_create_token(tmp_path)
    master, slave = os.openpty()  # a real terminal device: isatty() is true for it
    try:
        with os.fdopen(slave, "w", closefd=False) as tty:
            monkeypatch.setattr(sys, "stdout", tty)
            _greet(_config(tmp_path), "http://127.0.0.1:8470/")  # type: ignore[arg-type]
            tty.flush()
        text = os.read(master, 65536).decode()
    finally:
        os.close(master)
        os.close(slave)
    assert f"http://127.0.0.1:8470/#token={token}" in text


def test_no_token_when_output_is_not_a_terminal(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    token, _ = load_or_create_token(tmp_path)
    log = io.StringIO()
    monkeypatch.setattr(sys, "stdout", log)
    _greet(_config(tmp_path), "http://127.0.0.1:8470/")  # type: ignore[arg-type]
    text = log.getvalue()
    assert token not in text and "#token=" not in text
    assert f"access token: phasewatch token --data {tmp_path}" in text
