"""Option values that are not what they claim fail when the config is composed: one line naming the option and
the expected range, exit code 2, before any data is made or anything is trained."""

from __future__ import annotations

import pytest

from coreach.config.check import compose_config
from coreach.errors import ConfigError
from test_cli import run

CASES = [
    ("trainer.max_epochs=abc", "trainer.max_epochs", "expected an integer >= 1, got 'abc'"),
    ("trainer.lr=fast", "trainer.lr", "expected a number in (0.0, 10.0)"),
    ("trainer.lr=0", "trainer.lr", "expected a number in (0.0, 10.0)"),
    ("data.val_fraction=1.5", "data.val_fraction", "expected a number in (0.0, 1.0)"),
    ("data.batch_size=0", "data.batch_size", "expected an integer >= 1"),
    ("seed=-1", "seed", "expected an integer >= 0"),
    ("model.latent_dim=0", "model.latent_dim", "expected an integer >= 1"),
    ("model.hidden=[]", "model.hidden", "expected a non-empty list of positive integers"),
    ("loss.kl.weight=-1", "loss.kl.weight", "expected a number in [0.0, inf]"),
    ("dataset.noise=-0.1", "dataset.noise", "expected a number in [0.0, 10.0]"),
    ("dataset.spread_share=abc", "dataset.spread_share", "expected a number in [0.0, 1.0], got 'abc'"),
]


@pytest.mark.parametrize("override, option, expected", CASES, ids=[c[1] for c in CASES])
def test_bad_value_fails_at_compose_time(override, option, expected):
    with pytest.raises(ConfigError) as err:
        compose_config("train", [override])
    assert err.value.where == option
    assert expected in err.value.problem


def test_defaults_and_edge_values_compose():
    cfg = compose_config("train", ["trainer.max_epochs=1", "data.val_fraction=0.5", "seed=0", "trainer.patience=0"])
    assert cfg.trainer.max_epochs == 1 and cfg.seed == 0


def test_the_command_exits_2_with_one_line(tmp_path):
    out = run(["train", "trainer.max_epochs=abc"], cwd=tmp_path)
    assert out.returncode == 2
    assert out.stderr.strip() == "coreach: error: trainer.max_epochs: expected an integer >= 1, got 'abc'"
    assert not (tmp_path / "data").exists() and not (tmp_path / "mlflow.db").exists()  # nothing was made
