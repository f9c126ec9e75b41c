"""The view's credential file: an entry that cannot be used (a token shorter than 16 characters, a bad name) is
named — file, line, person — by ``check-config`` and in the daemon's log, never silently dropped (README "View and
JSON API": tokens of at least 16 characters)."""

from __future__ import annotations

from pathlib import Path

import pytest
import structlog

from edgevib.daemon.cli import main
from edgevib.daemon.config import ViewConfig
from edgevib.daemon.web.actions import Actions, token_warnings

EXAMPLE = Path(__file__).resolve().parents[2] / "config" / "example-plant.toml"
GOOD = "shift-token-alice-0123456789"


def _file(tmp_path: Path) -> Path:
    f = tmp_path / "view-tokens"
    f.write_text(f"# operators of the Quarry Lane station\nalice:{GOOD}\nbob:short\n\nc/d:another-token-0123456789\n")
    return f


def test_entries_left_out_are_named_with_line_and_person(tmp_path: Path) -> None:
    f = _file(tmp_path)
    lines = token_warnings(ViewConfig(actions=True, token_file=str(f)))
    assert len(lines) == 2
    assert lines[0].startswith(f"view.token_file ({f}): line 3 (bob): the token has 5 characters, fewer than 16")
    assert "line 5: name 'c/d'" in lines[1]
    assert not any("short" in ln or "another-token" in ln or GOOD in ln for ln in lines)  # no token is shown
    f.write_text("bob:short\n")
    assert token_warnings(ViewConfig(actions=True, token_file=str(f)))[-1].endswith(
        "no usable token: token sign-in is refused for everyone")
    f.write_text(f"alice:{GOOD}\n")
    assert token_warnings(ViewConfig(actions=True, token_file=str(f))) == []


def test_the_daemon_logs_them_once_and_the_good_tokens_work(tmp_path: Path) -> None:
    f = _file(tmp_path)
    with structlog.testing.capture_logs() as logs:
        actions = Actions(ViewConfig(actions=True, token_file=str(f)), client_certificates=False)
        assert actions._token_name(GOOD) == "alice" and actions._token_name("short") is None
    left_out = [e for e in logs if e["event"] == "view credential entry left out"]
    assert [e["problem"][:12] for e in left_out] == ["line 3 (bob)", "line 5: name"]  # at start, not again
    assert all(e["log_level"] == "warning" and str(f) in e["source"] for e in left_out)


def test_check_config_warns(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    cfg = tmp_path / "plant.toml"
    cfg.write_text(EXAMPLE.read_text() + f'\n[view]\nactions = true\ntoken_file = "{_file(tmp_path)}"\n')
    assert main(["check-config", str(cfg)]) == 0
    out = capsys.readouterr().out
    assert "# warning: view.token_file (" in out and "line 3 (bob): the token has 5 characters" in out
