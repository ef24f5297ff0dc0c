"""Solver parameters: defaults, TOML round trip, refusal of unknown names and bad values."""

from __future__ import annotations

import tomllib
from pathlib import Path

import pytest

from archive.errors import InputError, UsageError
from archive.solve.params import default_params, load_params, params_toml, resolve_params


def test_defaults_carry_the_published_constants() -> None:
    p = default_params()
    # Huber k = 1.345 and Tukey c = 4.685 give 95 % efficiency at the normal
    # (statsmodels HuberT / TukeyBiweight docs, statsmodels RLM documentation).
    assert p["estimate"]["huber_k"] == 1.345
    assert p["estimate"]["tukey_c"] == 4.685
    assert p["estimate"]["estimator"] == "huber"
    assert p["estimate"]["reject_quantile"] == 0.999
    assert p["uncertainty"]["method"] == "batch"
    assert p["uncertainty"]["batch_hours"] >= 1.0  # hours, not minutes (methods §4)


def test_commented_toml_round_trips_to_the_defaults(tmp_path: Path) -> None:
    text = params_toml()
    assert "# " in text and "[estimate]" in text
    assert tomllib.loads(text) == default_params()
    f = tmp_path / "p.toml"
    f.write_text(text)
    assert load_params(f) == default_params()


def test_overrides_merge_into_the_defaults(tmp_path: Path) -> None:
    f = tmp_path / "p.toml"
    f.write_text('[estimate]\nestimator = "tukey"\n[uncertainty]\nfloor = 1\n')
    p = load_params(f)
    assert p["estimate"]["estimator"] == "tukey"
    assert p["uncertainty"]["floor"] == 1.0 and isinstance(p["uncertainty"]["floor"], float)
    assert p["estimate"]["huber_k"] == 1.345


@pytest.mark.parametrize("text, words", [
    ("[estimate]\nhuber = 1.5\n", "unknown parameter estimate.huber"),
    ("[estimator]\nk = 1\n", "unknown section [estimator]"),
    ('[estimate]\nestimator = "median"\n', "estimator 'median' is unknown"),
    ('[screen]\nmax_hdop = "four"\n', "screen.max_hdop must be a number"),
    ("[screen]\nrequire_3d = 1\n", "must be true or false"),
])
def test_unknown_or_bad_values_are_refused(tmp_path: Path, text: str, words: str) -> None:
    f = tmp_path / "p.toml"
    f.write_text(text)
    with pytest.raises(UsageError, match=words.replace("[", r"\[").replace("]", r"\]")) as exc:
        load_params(f)
    assert str(f) in str(exc.value)


def test_unreadable_files_name_the_file(tmp_path: Path) -> None:
    with pytest.raises(InputError, match="file not found"):
        load_params(tmp_path / "missing.toml")
    f = tmp_path / "bad.toml"
    f.write_text("[estimate\n")
    with pytest.raises(InputError, match="not valid TOML"):
        load_params(f)
    with pytest.raises(UsageError):
        resolve_params({"uncertainty": {"min_batches": 1}})
