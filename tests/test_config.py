"""Sweep-file checking: every key family, its wording, and the minimal file of the core issue."""
from __future__ import annotations

from pathlib import Path

import pytest

from depthplan.config import config_from_dict, dump_config, load_config
from depthplan.errors import ConfigError

MINIMAL = """
name: kiln-depth
data:
  source: csv            # synthetic | digits | csv | npz
  path: readings.csv
  label: outcome
  validation_fraction: 0.2
model:
  width: 32
  activation: tanh
  init: he
sweep:
  depths: [1, 2, 3, 4, 6, 8, 12]
  seeds: 5
train:
  optimizer: sgd
  learning_rate: 0.05
  batch_size: 32
  max_updates: 20000
  eval_every: 20
  converge_when:
    train_loss_below: 0.1
"""


def test_minimal_file_is_accepted_as_written(write_yaml, tmp_path: Path) -> None:
    (tmp_path / "readings.csv").write_text("a,b,outcome\n1,2,x\n3,4,y\n")
    cfg = load_config(write_yaml(MINIMAL))
    assert cfg.name == "kiln-depth"
    assert cfg.data.path == str((tmp_path / "readings.csv").resolve())   # relative to the YAML file
    assert cfg.sweep.depths == (1, 2, 3, 4, 6, 8, 12)
    assert cfg.sweep.seeds == (0, 1, 2, 3, 4)
    assert cfg.train.learning_rate == (0.05,)
    assert cfg.train.converge_when.train_loss_below == 0.1
    assert cfg.model.widths(3) == (32, 32, 32)


def test_defaults_round_trip_through_the_resolved_config(tiny_config: Path) -> None:
    import yaml

    cfg = load_config(tiny_config)
    again = config_from_dict(yaml.safe_load(dump_config(cfg)))
    assert again.fingerprint() == cfg.fingerprint()
    assert again.to_dict() == cfg.to_dict()


@pytest.mark.parametrize("patch, pattern", [
    ("sweep: {depths: [1, -2, 3]}", r"sweep\.depths\[1\]: must be a positive integer, got -2"),
    ("sweep: {depths: [1, 1]}", r"sweep\.depths: must not repeat"),
    ("sweep: {depths: 3}", r"sweep\.depths: must be a non-empty list"),
    ("sweep: {seeds: 0}", r"sweep\.seeds: must be a positive integer, got 0"),
    ("sweep: {seeds: [0, -1]}", r"sweep\.seeds\[1\]: must be an integer >= 0"),
    ("sweep: {seedz: 3}", r"unknown key 'seedz' in sweep \(did you mean 'seeds'\?\)"),
    ("train: {learning_rate: -0.01}", r"train\.learning_rate: must be a number > 0, got -0\.01"),
    ("train: {learning_rate: [0.1, 'fast']}", r"train\.learning_rate\[1\]: must be a number"),
    ("train: {max_update: 10}", r"unknown key 'max_update' in train \(did you mean 'max_updates'\?\)"),
    ("train: {batch_size: 1.5}", r"train\.batch_size: must be a positive integer, got 1\.5"),
    ("train: {optimizer: lbfgs}", r"train\.optimizer: must be one of sgd, adam"),
    ("train: {momentum: 1.0}", r"train\.momentum: must be a number >= 0 and < 1"),
    ("train: {eval_rows: 0}", r"train\.eval_rows: must be a positive integer, got 0"),
    ("train: {max_updates: 10, eval_every: 20}", r"train\.eval_every: must not exceed"),
    ("train: {converge_when: {}}", r"train\.converge_when: must set at least one"),
    ("train: {converge_when: {train_acuracy_at_least: 0.9}}", r"did you mean 'train_accuracy_at_least'"),
    ("train: {converge_when: {validation_accuracy_at_least: 1.5}}", r"validation_accuracy_at_least: must be a number > 0 and <= 1"),
    ("model: {activation: swish}", r"model\.activation: must be one of tanh, relu, gelu, sigmoid"),
    ("model: {init: kaimin}", r"model\.init: .*did you mean 'kaiming'"),
    ("model: {width: [32, 0]}", r"model\.width\[1\]: must be a positive integer"),
    ("model: {width: [32]}", r"model\.width: lists 1 widths but sweep\.depths goes to"),
    ("model: {init_gain: 0}", r"model\.init_gain: must be a number > 0"),
    ("data: {source: parquet}", r"data\.source: must be one of"),
    ("data: {source: csv, label: y}", r"data\.path: is required when data\.source is csv"),
    ("data: {source: csv, path: nowhere.csv, label: y}", r"data\.path: no such file"),
    ("data: {validation_fraction: 0.95}", r"data\.validation_fraction: must be a number >= 0 and <= 0\.9"),
    ("probes: {snr: maybe}", r"probes\.snr: must be true or false"),
    ("probes: {information: 1}", r"probes\.information: must be true or false"),
    ("probes: {information_bins: 1}", r"probes\.information_bins: must be an integer >= 2, got 1"),
    ("probes: {information_bin: 20}", r"unknown key 'information_bin' in probes \(did you mean 'information_bins'\?\)"),
    ("output: {storage: 'postgresql://u:secret@db/x'}", r"output\.storage: must not hold credentials"),
    ("colour: red", r"unknown key 'colour'"),
])
def test_bad_values_name_their_key_path(write_yaml, patch: str, pattern: str) -> None:
    with pytest.raises(ConfigError, match=pattern):
        load_config(write_yaml("name: t\n" + patch + "\n"))


def test_every_problem_is_collected_into_one_line(write_yaml) -> None:
    with pytest.raises(ConfigError) as info:
        load_config(write_yaml("name: t\nsweep: {depths: [0], seeds: -1}\ntrain: {learning_rate: 0}\n"))
    msg = str(info.value)
    assert msg.startswith("3 problems in sweep.yaml")
    assert "\n" not in msg


def test_not_yaml_names_line_and_column(write_yaml) -> None:
    with pytest.raises(ConfigError, match=r"sweep\.yaml: line 3, column 1: not valid YAML"):
        load_config(write_yaml("name: t\nsweep: {depths: [1, 2\n"))


def test_missing_file_and_missing_name(write_yaml, tmp_path: Path) -> None:
    with pytest.raises(ConfigError, match="no such sweep file"):
        load_config(tmp_path / "absent.yaml")
    with pytest.raises(ConfigError, match=r"name: is required"):
        load_config(write_yaml("sweep: {depths: [1]}\n"))
    with pytest.raises(ConfigError, match="must be a YAML mapping"):
        load_config(write_yaml("- 1\n- 2\n"))


def test_fingerprint_follows_what_changes_a_measurement(write_yaml) -> None:
    a = load_config(write_yaml("name: a\ntrain: {learning_rate: 0.1}\n", "a.yaml"))
    b = load_config(write_yaml("name: b\ntrain: {learning_rate: 0.1}\noutput: {dir: elsewhere}\n", "b.yaml"))
    c = load_config(write_yaml("name: a\ntrain: {learning_rate: 0.2}\n", "c.yaml"))
    assert a.fingerprint() == b.fingerprint()      # name and output folder change no number
    assert a.fingerprint() != c.fingerprint()


def test_an_unset_setting_does_not_change_the_fingerprint(write_yaml, monkeypatch: pytest.MonkeyPatch) -> None:
    import dataclasses

    from depthplan.config import SweepFile

    cfg = load_config(write_yaml("name: a\ntrain: {learning_rate: 0.1}\n"))
    before = cfg.fingerprint()
    with_rows = dataclasses.replace(cfg, train=dataclasses.replace(cfg.train, eval_rows=500))
    assert with_rows.fingerprint() != before                 # a set value counts
    # a setting added in a later version, unset: sweeps stored before it keep their fingerprint
    plain = SweepFile.to_dict
    monkeypatch.setattr(SweepFile, "to_dict",
                        lambda self: {**plain(self), "train": {**plain(self)["train"], "later_setting": None}})
    assert cfg.fingerprint() == before


def test_information_probe_is_off_by_default_and_leaves_old_fingerprints(write_yaml) -> None:
    # common practice: a key added later, left unset, must not change the fingerprint of a stored sweep
    plain = load_config(write_yaml("name: a\n", "a.yaml"))
    off = load_config(write_yaml("name: a\nprobes: {information: false}\n", "b.yaml"))
    on = load_config(write_yaml("name: a\nprobes: {information: true, information_bins: 12}\n", "c.yaml"))
    assert not plain.probes.information and plain.probes.bins == 30
    assert off.fingerprint() == plain.fingerprint()
    assert on.probes.information and on.probes.bins == 12 and on.fingerprint() != plain.fingerprint()


# --------------------------------------------------------------------------- model families

@pytest.mark.parametrize("patch, pattern", [
    ("model: {family: transformer}", r"model\.family: must be one of mlp, residual, conv, got 'transformer'"),
    ("model: {family: residual, norm: batch}", r"model\.norm: must be one of none, layer, got 'batch'"),
    ("model: {family: residual, branch_scale: 2}", r"model\.branch_scale: must be one of 1, depth, got 2"),
    ("model: {norm: layer}", r"model\.norm: applies to model\.family residual only; this model is mlp"),
    ("model: {family: conv, branch_scale: depth}", r"model\.branch_scale: applies to model\.family residual only"),
    ("model: {channels: 8}", r"model\.channels: applies to model\.family conv only; this model is mlp"),
    ("model: {family: conv, channels: 0}", r"model\.channels: must be a positive integer, got 0"),
    ("model: {family: conv}", r"model\.family: conv needs image rows .* got data\.source synthetic"),
    ("model: {family: residual, width: [8, 8]}", r"model\.width: must be one integer for model\.family residual"),
    ("model: {factory: 'nets.py'}", r'model\.factory: must be "package\.module:function", got \'nets\.py\''),
    ("model: {factory: 'a.b:c', family: conv}", r"model\.family: must be left out when model\.factory is set"),
    ("model: {options: {width: 3}}", r"model\.options: applies only with model\.factory"),
    ("model: {factory: 'a:b', options: [1]}", r"model\.options: must be a mapping of keyword arguments"),
    ("model: {factory: 'a:b', options: {depth: 3}}", r"model\.options: must not set depth"),
    ("model: {factory: 'a:b', factory_path: nowhere}", r"model\.factory_path: no such folder"),
    ("model: {familly: residual}", r"unknown key 'familly' in model \(did you mean 'family'\?\)"),
])
def test_bad_model_family_keys_name_their_key_path(write_yaml, patch: str, pattern: str) -> None:
    with pytest.raises(ConfigError, match=pattern):
        load_config(write_yaml("name: t\n" + patch + "\n"))


def test_family_keys_resolve_and_leave_an_mlp_fingerprint_alone(write_yaml, tmp_path: Path) -> None:
    import yaml

    plain = load_config(write_yaml("name: a\nmodel: {width: 16}\n", "a.yaml"))
    named = load_config(write_yaml("name: a\nmodel: {width: 16, family: mlp, norm: none}\n", "b.yaml"))
    assert named.fingerprint() == plain.fingerprint() and plain.to_dict()["model"]["family"] is None
    res = load_config(write_yaml("name: a\nmodel: {width: 16, family: residual, branch_scale: depth, norm: layer}\n"))
    assert (res.model.family_name, res.model.options_text()) == ("residual", "branch_scale=depth; norm=layer")
    assert res.fingerprint() != plain.fingerprint()
    one = load_config(write_yaml("name: a\nmodel: {family: residual, branch_scale: 1}\n", "c.yaml"))
    assert one.model.branch_scale is None and one.model.options_text() == "branch_scale=1; norm=none"
    fac = load_config(write_yaml("name: a\nmodel: {factory: 'my.nets:build', options: {width: 8}}\n", "d.yaml"))
    assert fac.model.factory_path == str(tmp_path.resolve())           # the YAML file's folder
    assert fac.model.options_text() == 'my.nets:build {"width":8}'
    again = config_from_dict(yaml.safe_load(dump_config(fac)))      # as a worker process reads it back
    assert again.model == fac.model and again.fingerprint() == fac.fingerprint()
