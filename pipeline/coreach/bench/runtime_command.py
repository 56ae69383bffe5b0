"""`coreach bench runtime`: the Hydra entry of the runtime latency benchmark (coreach.runtime.latency)."""

from __future__ import annotations

from pathlib import Path

from omegaconf import DictConfig, OmegaConf

from coreach.errors import ConfigError


def run(cfg: DictConfig) -> dict:
    """Latency of `cfg.bundle`'s runtime session against a bare onnxruntime call, in one run."""
    from coreach.runtime.latency import run_runtime_bench

    bundle = "" if OmegaConf.is_missing(cfg, "bundle") else str(cfg.bundle)
    if not bundle or not Path(bundle).expanduser().is_dir():
        raise ConfigError("option bundle", f"expected a release bundle folder (releases/<name>/v<version>), got "
                                           f"{bundle!r}")  # fmt: skip
    for key in ("steps", "warmup"):
        if int(cfg[key]) < (1 if key == "steps" else 0):
            raise ConfigError(f"option {key}", f"expected a positive integer, got {cfg[key]!r}")
    if not float(cfg.dt) > 0:
        raise ConfigError("option dt", f"expected a control period > 0 s, got {cfg.dt!r}")
    out = run_runtime_bench(Path(bundle).expanduser(), steps=int(cfg.steps), dt=float(cfg.dt),
                            warmup=int(cfg.warmup))  # fmt: skip
    return {"bundle": str(Path(bundle).expanduser().resolve()), **out}
