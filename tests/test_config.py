"""The config: shipped defaults agree with the stages' settings; user errors name file and key."""

import dataclasses
import tomllib

import pytest

from pipeline import cli
from pipeline.config import _SECTIONS, Config, default_config_text, load_config
from pipeline.errors import ConfigError


def test_default_file_matches_every_stage_setting():
    tables = tomllib.loads(default_config_text())
    defaults = Config()
    for name, cls in _SECTIONS.items():
        fields = {f.name: getattr(getattr(defaults, name), f.name) for f in dataclasses.fields(cls)}
        set_in_file = tables.get(name, {})
        # Every key in the file is a field with the same default; unset keys are the None ones.
        for key, value in set_in_file.items():
            assert key in fields, f"[{name}] {key} is in default.toml but not in {cls.__name__}"
            expected = fields[key]
            assert value == (list(expected) if isinstance(expected, tuple) else expected), key
        missing = [k for k, v in fields.items() if k not in set_in_file and v is not None]
        assert not missing, f"[{name}] default.toml lacks {missing}"
        for key in (k for k, v in fields.items() if v is None):
            assert f"# {key} =" in default_config_text(), f"[{name}] {key} not documented"


def test_default_rules_load_and_are_marked_common_practice():
    config = load_config()
    assert {r.name for r in config.qc.rules} >= {"vrest", "bridge-error", "noisy-baseline"}
    assert "common practice" in default_config_text()


def test_config_command_prints_the_file(capsys):
    assert cli.main(["config"]) == 0
    assert capsys.readouterr().out == default_config_text()


def test_user_config_overrides_only_what_it_sets(tmp_path):
    path = tmp_path / "lab.toml"
    path.write_text(
        '[passive]\nss_window_s = 0.15\n[[qc.rule]]\nname = "vrest"\nmax = -55\n'
        '[[qc.rule]]\nname = "slow"\ncolumn = "tau_ms"\nscope = "cell"\nmax = 80\n'
        'action = "flag"\n'
    )
    config = load_config(path)
    default = load_config()
    assert config.passive.ss_window_s == 0.15
    assert config.passive.baseline_window_s == default.passive.baseline_window_s
    vrest = next(r for r in config.qc.rules if r.name == "vrest")
    assert vrest.max == -55.0 and vrest.column == "vrest_mv" and vrest.action == "fail"
    assert len(config.qc.rules) == len(default.qc.rules) + 1
    assert config.digest() != default.digest()


@pytest.mark.parametrize(
    ("text", "match"),
    [
        (
            "[passive]\nss_windw_s = 0.2\n",
            r"lab.toml: \[passive\] unknown key 'ss_windw_s' \(did you mean 'ss_window_s'\?\)",
        ),
        (
            "[passive]\nss_window_s = 'long'\n",
            r"\[passive\] ss_window_s must be a number, got 'long'",
        ),
        ("[passive]\nremove_hum = 1\n", r"remove_hum must be true or false"),
        ("[report]\nfigure_dpi = 1.5\n", r"figure_dpi must be a whole number"),
        ("[pasive]\n", r"unknown table \[pasive\] \(did you mean 'passive'\?\)"),
        ("[passive]\nss_window_s = -0.1\n", r"ss_window_s must be >= 0"),
        ("[passive]\nmin_window_s = 0.5\n", r"min_window_s is longer than baseline_window_s"),
        (
            "[passive]\nfit_start_fraction = 0.9\nfit_end_fraction = 0.5\n",
            r"fit_start_fraction < fit_end_fraction",
        ),
        ("[steps]\nschedule_onset_s = 0.1\n", r"give all four schedule keys"),
        # at 0 the edge detector's rounding makes edges of a clean step (found by a review)
        ("[steps]\nmin_amplitude_a = 0.0\n", r"min_amplitude_a must be > 0"),
        ("[run]\nworkers = -1\n", r"workers must be >= 0"),
        (
            "[[qc.rule]]\nname = 'vrest'\naction = 'exclude'\n",
            r"cell rule's action must be flag or fail",
        ),
        ("passive = 3\n", r"\[passive\] must be a table"),
        ("[passive\n", r"not valid TOML"),
    ],
)
def test_config_errors_name_file_key_and_allowed(tmp_path, text, match):
    path = tmp_path / "lab.toml"
    path.write_text(text)
    with pytest.raises(ConfigError, match=match):
        load_config(path)


def test_bad_config_exits_2_with_message(tmp_path, capsys):
    path = tmp_path / "lab.toml"
    path.write_text("[passive]\nnope = 1\n")
    assert cli.main(["run", str(tmp_path), "-c", str(path), "-o", str(tmp_path / "out")]) == 2
    err = capsys.readouterr().err
    assert "config error" in err and "lab.toml" in err and "'nope'" in err
    assert "Traceback" not in err


def test_missing_config_file(tmp_path):
    with pytest.raises(ConfigError, match=r"nope.toml: config file not found"):
        load_config(tmp_path / "nope.toml")
