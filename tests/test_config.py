"""Experiment configs: one vocabulary with the Python API, validated on load with helpful messages."""

import dataclasses
import inspect
import tomllib

import pytest

from threefold.models.registry import MODELS, model_class
from threefold.pipeline.config import (
    ConfigError, load_config, model_defaults, parse_config, parse_overrides,
)
from threefold.core.feedback import FeedbackWeighting

from _tracking import ROOT, SMALL_CONFIG, write_config

EXAMPLE = ROOT / "experiments" / "quillfen-courier.toml"


@pytest.fixture
def small(tmp_path):
    return load_config(write_config(tmp_path))


def test_the_example_config_loads_and_round_trips_through_toml():
    config = load_config(EXAMPLE)
    assert set(config.models) == {"popularity", "mf", "cp", "tucker"}
    assert config["data"]["events"] == str((ROOT / "data_samples/quillfen-courier/events.parquet").resolve())
    again = parse_config(tomllib.loads(config.to_toml()), source="round trip")
    assert again.sections == config.sections
    assert again.fingerprint() == config.fingerprint()


def test_defaults_are_filled_from_the_python_api(small):
    assert small["weighting"] == dataclasses.asdict(FeedbackWeighting())
    cp = small.models["cp"]
    assert cp["solver"] == "als" and cp["reg"] == 0.1 and cp["tol"] == 1e-4  # CPModel's defaults
    assert cp["rank"] == 4 and cp["random_state"] == 3  # as written


def test_model_keys_are_exactly_the_estimator_parameters():
    for method in MODELS:
        signature = inspect.signature(model_class(method))
        expected = {name for name in signature.parameters if name not in ("self", "callback")}
        assert set(model_defaults(method)) == expected, method


def test_section_keys_are_parameter_names_of_the_api():
    from threefold.data.build import build_tensor
    from threefold.data.context import parse_context
    from threefold.evaluation.harness import EvaluationOptions
    from threefold.evaluation.splits import temporal_split
    from threefold.pipeline.prepare import read_log

    config = load_config(EXAMPLE)
    assert set(config["weighting"]) == {f.name for f in dataclasses.fields(FeedbackWeighting)}
    assert set(config["split"]) <= set(inspect.signature(temporal_split).parameters)
    build_api = set(inspect.signature(build_tensor).parameters) | set(inspect.signature(parse_context).parameters)
    # the command line's flag for the propensity option (threefold build --position-propensity)
    assert set(config["build"]) - build_api == {"position_propensity"}
    data_api = set(inspect.signature(read_log).parameters)  # the reader of train, build and refresh
    assert set(config["data"]) - data_api == {"events"}  # the log, named as on the command line
    evaluation_api = {f.name for f in dataclasses.fields(EvaluationOptions)}
    assert set(config["evaluation"]) - evaluation_api == {"metrics"}  # which metrics summaries show
    defaults = EvaluationOptions()  # one place for the defaults: a config that sets nothing gets them
    filled = parse_config({"data": {"events": "e.csv"}, "split": {"cutoff": 0}, "models": {"m": {"method": "random"}}})
    for key in set(config["evaluation"]) - {"metrics"}:
        expected = getattr(defaults, key)
        assert filled["evaluation"][key] == (list(expected) if isinstance(expected, tuple) else expected), key


def test_unknown_key_is_rejected_with_the_closest_valid_name(small):
    with pytest.raises(ConfigError, match=r"unknown key 'aplha' in \[weighting\]; did you mean 'alpha'\?"):
        small.with_overrides({"weighting.aplha": 5.0})
    with pytest.raises(ConfigError, match=r"unknown key 'rnak' in \[models\.cp\]; did you mean 'rank'\?"):
        small.with_overrides({"models.cp.rnak": 8})
    with pytest.raises(ConfigError, match=r"unknown key 'wieghting' in the config; did you mean 'weighting'\?"):
        small.with_overrides({"wieghting.alpha": 5.0})
    with pytest.raises(ConfigError, match=r"unknown key 'rnak' in \[models\.cp\]; did you mean 'rank'\?"):
        small.with_overrides({"sweep.space.models.cp.rnak": [2, 4]})


def test_out_of_range_values_name_key_range_and_value(small):
    with pytest.raises(ConfigError, match=r"The 'alpha' parameter of \[weighting\] must be a float in the range "
                                          r"\[0, inf\)\. Got -1\.5 instead\."):
        small.with_overrides({"weighting.alpha": -1.5})
    with pytest.raises(ConfigError, match=r"The 'rank' parameter of \[models\.cp\] must be an int in the range "
                                          r"\[1, inf\)\. Got 0 instead\."):
        small.with_overrides({"models.cp.rank": 0})
    with pytest.raises(ConfigError, match=r"The 'max_sweeps' parameter of \[models\.cp\] must be an int in the range "
                                          r"\[1, inf\)\. Got 2\.5 instead\."):
        small.with_overrides({"models.cp.max_sweeps": 2.5})
    with pytest.raises(ConfigError, match=r"The 'solver' parameter of \[models\.cp\] must be one of 'als', 'cg'\. "
                                          r"Got 'newton' instead\."):
        small.with_overrides({"models.cp.solver": "newton"})
    with pytest.raises(ConfigError, match=r"The 'metric' parameter of \[sweep\] must be one of 'recall'"):
        small.with_overrides({"sweep.metric": "ndgc"})


def test_values_checked_across_sections(small, tmp_path):
    with pytest.raises(ConfigError, match=r"baseline 'pop' is not a model; models are \['cp', 'popularity'\]"):
        small.with_overrides({"evaluation.baseline": "pop"})
    with pytest.raises(ConfigError, match=r"one daypart label per start hour; got 5 starts and 1 labels"):
        small.with_overrides({"build.daypart_labels": ["all day"]})
    with pytest.raises(ConfigError, match=r"Unknown IANA time zone 'Mars/Base'"):
        small.with_overrides({"data.timezone": "Mars/Base"})
    with pytest.raises(ConfigError, match=r"'cutoff' parameter '2026-04-04' has no UTC offset"):
        small.with_overrides({"split.cutoff": "2026-04-04"})
    text = SMALL_CONFIG.replace("[split]", "[splitting]")
    with pytest.raises(ConfigError, match=r"unknown key 'splitting' in the config; did you mean 'split'\?"):
        load_config(write_config(tmp_path, text, "bad.toml"))


def test_overrides_read_toml_values(small):
    overrides = parse_overrides(["models.cp.rank=8", 'build.contexts=["device"]', "data.timezone=UTC",
                                 "split.cutoff=2026-04-03T12:00:00Z", "weighting.w0=0.5"])
    assert overrides["models.cp.rank"] == 8 and overrides["build.contexts"] == ["device"]
    assert overrides["data.timezone"] == "UTC"  # not valid TOML: taken as a string
    config = small.with_overrides(overrides)
    assert config["split"]["cutoff"] == "2026-04-03T12:00:00+00:00"  # a TOML date-time kept as ISO-8601 text
    assert config.flat()["models.cp.rank"] == 8 and config["weighting"]["w0"] == 0.5
    with pytest.raises(ConfigError, match=r"--set 'rank=8': write section\.key=value"):
        parse_overrides(["rank=8"])


def test_relative_paths_are_read_from_the_config_folder(tmp_path):
    (tmp_path / "sub").mkdir()
    text = SMALL_CONFIG.replace(f'events = "{ROOT}/data_samples/quillfen-courier/events.parquet"', 'events = "log.csv"')
    config = load_config(write_config(tmp_path / "sub", text))
    assert config["data"]["events"] == str(tmp_path / "sub" / "log.csv")


def test_sweep_space_leaves_are_validated_like_their_keys(small):
    config = small.with_overrides({"sweep.space": {"models.cp.rank": [2, 4], "weighting": {"alpha": {"low": 1, "high": 20,
                                                                                                   "log": True}}}})
    assert config["sweep"]["space"] == {"models.cp.rank": [2, 4], "weighting.alpha": {"low": 1.0, "high": 20.0, "log": True}}
    with pytest.raises(ConfigError, match=r"The 'rank' parameter of \[sweep\.space\] 'models\.cp\.rank' must be an int"):
        small.with_overrides({"sweep.space": {"models.cp.rank": [2, 0]}})
    with pytest.raises(ConfigError, match=r"needs numbers low < high"):
        small.with_overrides({"sweep.space": {"weighting.alpha": {"low": 2.0, "high": 1.0}}})
    with pytest.raises(ConfigError, match=r"must name a model of \[models\]"):
        small.with_overrides({"sweep.space": {"models.mf.rank": [2]}})


def test_missing_sections_and_keys_are_named(tmp_path):
    with pytest.raises(ConfigError, match=r"the config needs a \[models\] section"):
        parse_config({"data": {"events": "x"}, "split": {"cutoff": 0}})
    with pytest.raises(ConfigError, match=r"\[split\] needs the key 'cutoff'"):
        parse_config({"data": {"events": "x"}, "split": {}, "models": {"cp": {}}})
    with pytest.raises(FileNotFoundError, match=r"No experiment config at"):
        load_config(tmp_path / "missing.toml")


# ---------------------------------------------------------------------- checked before any data is read
BEFORE_DATA = [
    ({"models.cp.structure": "user*itme + item*device:2"}, r"\[models\.cp\]: Structure term 'user\*itme' uses mode 'itme'"),
    ({"models.cp.structure": "user*item + item*"}, r"\[models\.cp\]: .*"),
    ({"models.cp.fixed_modes": ["devic"]}, r"fixed_modes names the mode 'devic', but the tensor's modes are"),
    ({"models.tucker": {"method": "hooi", "rank": [2, 2, 2]}}, r"\[models\.tucker\]: rank lists 3 sizes, but the tensor has 4 modes"),
    ({"models.popularity.context_modes": ["page_tone"]}, r"context_modes names 'page_tone', but the context modes of \[build\]"),
    ({"sweep.space": {"models.cp.structure": ["user*item", "user*item*weather"]}},
     r"\[models\.cp\] with \[sweep\.space\] structure = 'user\*item\*weather': Structure term"),
    ({"sweep.space": {"models.tucker.rank": [[2, 2, 2, 2], [2, 2]]}, "models.tucker": {"method": "implicit_tucker"}},
     r"\[models\.tucker\] with \[sweep\.space\] rank = \[2, 2\]: rank lists 2 sizes"),
]


@pytest.mark.parametrize("overrides, message", BEFORE_DATA)
def test_model_settings_are_checked_against_the_modes_before_any_data_is_read(tmp_path, overrides, message):
    """The config names no existing log here: the error must come from the config alone."""
    text = SMALL_CONFIG.replace("events = ", "events = \"missing-on-purpose.parquet\"\n# ", 1)
    config_path = write_config(tmp_path, text)
    with pytest.raises(ConfigError, match=message):
        load_config(config_path, overrides)


def test_every_evaluation_key_reaches_the_evaluation_options(small):
    from threefold.pipeline.config import evaluation_options

    config = small.with_overrides({"evaluation.policy_ablation": True, "evaluation.aspect": "topic",
                                   "evaluation.sensitivity_users": 7})
    options = evaluation_options(config)
    for key, value in config["evaluation"].items():
        if key not in ("ks", "metrics"):  # ks gains the sweep's k; metrics are what summaries show
            assert getattr(options, key) == value, key


def test_unset_removes_a_key_so_a_model_can_switch_method(tmp_path):
    path = write_config(tmp_path, SMALL_CONFIG)
    with pytest.raises(ConfigError, match=r"unknown key 'structure' in \[models\.cp\]"):
        load_config(path, parse_overrides(["models.cp.method=hooi"]))
    config = load_config(path, parse_overrides(["models.cp.method=hooi"], ["models.cp.structure"]))
    assert config.models["cp"]["method"] == "hooi" and "structure" not in config.models["cp"]
    assert config.models["cp"]["rank"] == 4  # the keys both methods take are kept
    with pytest.raises(ConfigError, match=r"cannot remove 'models\.cp\.solver': the config does not set it"):
        load_config(path, parse_overrides([], ["models.cp.solver"]))
    with pytest.raises(ConfigError, match=r"--unset 'structure': write section\.key"):
        parse_overrides([], ["structure"])
