"""`coreach bench train`: what it measures and what it refuses (timings themselves are not asserted)."""

from __future__ import annotations

import pytest
import torch

from coreach.bench.train_bench import _without, run
from coreach.config.check import compose_config
from coreach.errors import ConfigError

TINY = ["dataset.episodes=40", "data.batch_size=128", "bench.epochs=1", "bench.rounds=1"]


def test_plain_side_leaves_out_only_the_regulariser(workdir):
    cfg = compose_config("bench_train", TINY)
    plain = _without(cfg, "goal_entropy")
    assert list(plain.loss) == ["reconstruction", "kl"]
    assert plain.model == cfg.model and list(cfg.loss) == ["reconstruction", "kl", "goal_entropy"]


@pytest.mark.parametrize("override,where", [("bench.regulariser=nope", "bench.regulariser"),
                                            ("bench.threads=0", "bench.threads")])
def test_bad_bench_options_raise_config_error(workdir, override, where):
    with pytest.raises(ConfigError) as err:
        run(compose_config("bench_train", [*TINY, override]))
    assert err.value.where == where


@pytest.fixture
def restore_threads():
    # bench.threads sets torch's process-wide thread count; later tests keep their own
    threads = torch.get_num_threads()
    yield
    torch.set_num_threads(threads)


@pytest.mark.slow
def test_bench_reports_both_comparisons(workdir, restore_threads):
    # one thread: two threads on cores another job is using spend most of a step waiting for each other
    out = run(compose_config("bench_train", [*TINY, "bench.threads=1"]))
    assert out["torch_threads"] == 1
    assert out["regulariser"] == "goal_entropy"
    for key in ("plain_bare_s", "regularised_bare_s", "plain_lightning_s", "regularised_lightning_s"):
        assert out[key] > 0
    bare = out["regularised_bare_s"] / out["plain_bare_s"]
    assert out["ratio_regularised_over_plain_bare"] == pytest.approx(bare)
    assert out["ratio_regularised_over_plain_lightning"] == pytest.approx(
        out["regularised_lightning_s"] / out["plain_lightning_s"]
    )
    assert out["ratio_lightning_over_bare"] > 0 and out["target_regularised_over_plain"] == 2.0
