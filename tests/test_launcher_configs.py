"""The sweep launchers selectable in conf/hydra/launcher: what each composes to, checked against the
launcher plugins' own config classes (hydra-joblib-launcher, hydra-submitit-launcher)."""

from __future__ import annotations

import pytest
from hydra import compose, initialize_config_module
from hydra.core.global_hydra import GlobalHydra
from omegaconf import OmegaConf


def launcher(*overrides: str):
    GlobalHydra.instance().clear()
    try:
        with initialize_config_module("coreach_conf", version_base="1.3"):
            cfg = compose("train", overrides=list(overrides), return_hydra_config=True)
    finally:
        GlobalHydra.instance().clear()
    return cfg.hydra.launcher


def test_local_is_joblib_with_two_workers_and_the_plugins_other_defaults():
    from hydra_plugins.hydra_joblib_launcher.config import JobLibLauncherConf

    got = launcher("hydra/launcher=local")
    plugin = OmegaConf.structured(JobLibLauncherConf)
    assert got._target_ == plugin._target_
    assert got.n_jobs == 2 and plugin.n_jobs == -1  # ours: two at a time; the plugin's: every core
    assert {k: v for k, v in got.items() if k != "n_jobs"} == {k: v for k, v in plugin.items() if k != "n_jobs"}
    assert launcher("hydra/launcher=local", "hydra.launcher.n_jobs=8").n_jobs == 8


def test_slurm_carries_the_labs_partition_time_and_cpus(monkeypatch):
    from hydra_plugins.hydra_submitit_launcher.config import SlurmQueueConf

    monkeypatch.delenv("COREACH_SLURM_PARTITION", raising=False)
    got = launcher("hydra/launcher=slurm")
    assert got._target_ == SlurmQueueConf._target_
    assert got.partition is None  # the cluster's default partition unless the lab names one
    assert (got.timeout_min, got.cpus_per_task) == (120, 4)
    assert list(got.setup) == ["export OMP_NUM_THREADS=4"]  # torch threads follow the allocation
    monkeypatch.setenv("COREACH_SLURM_PARTITION", "cpu-long")
    got = launcher("hydra/launcher=slurm", "hydra.launcher.timeout_min=30", "hydra.launcher.cpus_per_task=8")
    assert (got.partition, got.timeout_min, got.cpus_per_task) == ("cpu-long", 30, 8)
    assert list(got.setup) == ["export OMP_NUM_THREADS=8"]
    # every field the plugin knows is present, none invented
    assert set(got) == set(OmegaConf.structured(SlurmQueueConf))


def test_slurm_local_is_submitits_local_executor():
    from hydra_plugins.hydra_submitit_launcher.config import LocalQueueConf

    got = launcher("hydra/launcher=slurm_local")
    assert got._target_ == LocalQueueConf._target_
    assert got.timeout_min == 120 and got.cpus_per_task == 1


@pytest.mark.parametrize("name", ["local", "slurm", "slurm_local"])
def test_launcher_options_pass_the_cli_preflight(name, workdir):
    from coreach.config.check import preflight

    preflight("train", [f"hydra/launcher={name}", "seed=0,1"], multirun=True)
