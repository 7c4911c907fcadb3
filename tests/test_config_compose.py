"""Configs compose, and bad values fail before any work with the key named."""

from __future__ import annotations

import pytest
from hydra import compose, initialize_config_dir
from hydra.errors import ConfigCompositionException

from skymoments.config import ConfigError, conf_dir, validate


def _compose(*overrides: str):
    with initialize_config_dir(config_dir=str(conf_dir()), version_base="1.3"):
        return compose("run", overrides=list(overrides))


@pytest.mark.parametrize("experiment", ["quickstart", "smoke"])
def test_experiments_compose_and_validate(experiment):
    cfg = validate(_compose(f"experiment={experiment}"))
    assert cfg.name == experiment
    assert cfg.patch.npix > 0


def test_quickstart_is_the_documented_scenario():
    # The quickstart is specified as 64x64 pixels of 3 arcmin, filaments, noise-free,
    # r and the foreground amplitude drawn from priors, training from one image + synthesis.
    cfg = validate(_compose("experiment=quickstart"))
    assert (cfg.patch.npix, cfg.patch.pixel_arcmin) == (64, 3.0)
    assert cfg.sky.foreground._target_ == "skymoments.sky.foregrounds.Filaments"
    assert cfg.prior.noise_uk_arcmin.dist == "fixed" and cfg.prior.noise_uk_arcmin.value == 0.0
    assert cfg.prior.r.dist != "fixed" and cfg.prior.a_fg.dist != "fixed"
    assert cfg.augment.source == "single_image" and cfg.augment.bank


def test_negative_pixel_size_names_the_key():
    cfg = _compose("patch.pixel_arcmin=-3")
    with pytest.raises(ConfigError, match=r"patch\.pixel_arcmin"):
        validate(cfg)


def test_unknown_foreground_names_the_key_and_the_choices():
    # Foregrounds are chosen by _target_, like networks; only our own classes are built.
    cfg = _compose("sky.foreground._target_=os.system")
    with pytest.raises(ConfigError, match=r"_target_='os\.system'.*foregrounds\.Filaments"):
        validate(cfg)
    # The `name` of configs logged by earlier versions is still read, and checked.
    cfg = _compose("+sky.foreground.name=nebula")
    with pytest.raises(ConfigError, match=r"sky\.foreground\.name='nebula'.*Filaments"):
        validate(cfg)


def test_wrong_type_names_the_full_key():
    cfg = _compose("patch.npix=many")
    with pytest.raises(ConfigError, match=r"patch"):
        validate(cfg)


def test_unknown_model_fails_at_compose_time():
    with pytest.raises(ConfigCompositionException, match="model"):
        _compose("model=no_such_net")


def test_negative_width_names_the_key():
    cfg = _compose("experiment=smoke", "model.mean.width=-4")
    with pytest.raises(ConfigError, match=r"model\.mean\.width"):
        validate(cfg)


def test_bad_prior_names_the_key():
    cfg = _compose("prior.r.low=0.3", "prior.r.high=0.1")
    with pytest.raises(ConfigError, match=r"prior\.r"):
        validate(cfg)


def test_server_tracking_needs_a_uri():
    cfg = _compose("tracking=server")
    with pytest.raises(ConfigError, match=r"tracking\.uri"):
        validate(cfg)


@pytest.mark.parametrize("command", ["run", "simulate", "synthesize", "evaluate", "predict"])
def test_each_command_composes_only_its_own_nodes(command):
    # One primary config per command (conf/<command>.yaml), composed from the shared groups.
    with initialize_config_dir(config_dir=str(conf_dir()), version_base="1.3"):
        cfg = compose(command)
    others = {"predict", "compare", "evaluate", "settle"} - {command}
    assert not others & set(cfg), sorted(others & set(cfg))
    assert "tracking" in cfg and "name" in cfg


def _compose_predict(*overrides: str):
    with initialize_config_dir(config_dir=str(conf_dir()), version_base="1.3"):
        return compose("predict", overrides=list(overrides))


def test_predict_values_follow_the_registered_schema():
    # conf/predict/default.yaml holds values for exactly the schema's keys, and the same
    # defaults: the schema (ConfigStore schema/predict) is the one list of keys and types.
    from dataclasses import asdict

    from omegaconf import MISSING, OmegaConf

    from skymoments.config.schema import PredictSchema

    node = OmegaConf.to_container(_compose_predict().predict, throw_on_missing=False)
    assert node == {**asdict(PredictSchema()), "model": MISSING, "input": MISSING}


@pytest.mark.parametrize(
    ("overrides", "message"),
    [
        ((), r"mandatory config values are not set: predict\.input, predict\.model \("),
        (("predict.model=m",), r"not set: predict\.input \(.*e\.g\. predict\.input=map\.npy"),
        (("predict.batch_size=abc",), r"predict\.batch_size: Value 'abc' .* Integer"),
        (("predict.healpix.overlap=abc",), r"predict\.healpix\.overlap: Value 'abc'"),
        (("+predict.foo=1",), r"unknown predict keys \['foo'\]; known: model, input"),
        (("+predict.healpix.bar=1",), r"unknown predict\.healpix keys \['bar'\]; known: fields"),
    ],
)
def test_predict_node_is_checked_by_its_schema(overrides, message):
    set_both = ("predict.model=m", "predict.input=i")
    extra = () if overrides in ((), ("predict.model=m",)) else set_both
    cfg = _compose_predict(*extra, *overrides)
    with pytest.raises(ConfigError, match=message) as err:
        validate(cfg, command="predict")
    assert "\n" not in str(err.value)
    # The overrides every command line uses keep their names.
    ok = _compose_predict(
        *set_both, "predict.centres=[[30,-60]]", "predict.healpix.cut=exact", "predict.force=true"
    )
    validate(ok, command="predict")


def test_a_mandatory_value_is_checked_by_its_own_command_only():
    # The predict node's ??? values are the predict command's; other commands skip them.
    cfg = _compose_predict()
    validate(cfg, command="compare")
    with pytest.raises(ConfigError, match=r"predict\.input, predict\.model"):
        validate(cfg, command="predict")
