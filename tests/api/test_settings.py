"""Settings: defaults, then HELDOUT_* variables, then the app's mapping."""

from __future__ import annotations

import pytest

from service import create_app
from service.settings import SETTINGS, SettingsError, defaults, load_settings, markdown_table


def test_every_setting_is_documented() -> None:
    keys = [s.key for s in SETTINGS]
    assert len(keys) == len(set(keys))
    for s in SETTINGS:
        assert s.env == "HELDOUT_" + s.key and s.description.strip()
        assert s.parse(str(s.default)) == s.default  # the default survives its own parser
    assert markdown_table().count("\n") == len(SETTINGS) + 2


def test_precedence() -> None:
    env = {
        "HELDOUT_MAX_SEEDS": "8",
        "HELDOUT_DATABASE_URL": "sqlite:///from-env.db",
        "UNRELATED": "x",
    }
    values = load_settings(env, {"MAX_SEEDS": 4})
    assert values["MAX_SEEDS"] == 4
    assert values["DATABASE_URL"] == "sqlite:///from-env.db"
    assert values["WORKERS"] == defaults()["WORKERS"]


@pytest.mark.parametrize(
    "name, value",
    [
        ("HELDOUT_WORKERS", "zero"),
        ("HELDOUT_WORKERS", "0"),
        ("HELDOUT_CONFIDENCE_LEVEL", "1.5"),
        ("HELDOUT_BOOTSTRAP_RESAMPLES", "10"),
        ("HELDOUT_LOG_LEVEL", "chatty"),
    ],
)
def test_bad_environment_values_fail_at_start(name: str, value: str) -> None:
    with pytest.raises(SettingsError, match=name):
        load_settings({name: value})


def test_app_reads_the_environment(monkeypatch: pytest.MonkeyPatch, tmp_path: object) -> None:
    monkeypatch.setenv("HELDOUT_MAX_BODY_BYTES", "12345")
    monkeypatch.setenv("HELDOUT_DATABASE_URL", "sqlite:///ignored.db")
    app = create_app({"DATABASE_URL": "sqlite://"})
    assert app.config["MAX_BODY_BYTES"] == 12345 == app.config["MAX_CONTENT_LENGTH"]
    assert app.config["DATABASE_URL"] == "sqlite://"


def test_readme_settings_table_is_current() -> None:
    # The README's table is what `heldout settings` prints: a new setting must reach it.
    from pathlib import Path

    readme = (Path(__file__).resolve().parents[2] / "README.md").read_text(encoding="utf-8")
    assert markdown_table().strip() in readme
