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
    assert p["uncertainty"]["method"] == "pooled"
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


def test_a_manifest_without_the_newer_parameters_reads_as_its_own_time() -> None:
    from archive.solve.params import BEFORE, setting

    new = default_params()
    old = {sec: {k: v for k, v in keys.items() if (sec, k) not in BEFORE}
           for sec, keys in new.items()}
    assert setting(new, "flags", "move_method") == "scan"
    assert setting(new, "flags", "move_deliver") == "each"
    assert setting(old, "flags", "move_method") == "blocks"  # hour blocks, 6 h a side
    assert setting(old, "flags", "move_deliver") == "last"  # the last part delivered
    assert setting(old, "flags", "min_span_fraction") is None  # the absolute span rule
    assert setting(old, "window", "margin_fallback") is False
    for sec, key in BEFORE:  # every parameter read that way is a real parameter now
        assert key in new[sec]


@pytest.mark.parametrize("override, message", [
    ({"flags": {"move_method": "hours"}}, "flags.move_method 'hours' is unknown"),
    ({"flags": {"move_deliver": "first"}}, "flags.move_deliver 'first' is unknown"),
    ({"flags": {"min_span_fraction": 1.5}}, "flags.min_span_fraction must be between 0 and 1"),
    ({"flags": {"move_min_hours": 0.0}}, "flags.move_min_hours must be positive"),
    ({"uncertainty": {"method": "student"}}, "uncertainty.method 'student' is unknown"),
])
def test_the_new_parameters_are_checked(override: dict, message: str) -> None:
    with pytest.raises(UsageError, match=message):
        resolve_params(override)
