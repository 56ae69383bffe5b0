"""`coreach bench runtime`: the Hydra entry of the runtime latency benchmark (coreach.runtime.latency)."""

from __future__ import annotations

from omegaconf import DictConfig, OmegaConf

from coreach.errors import ConfigError
from coreach.release.bundle_store import bundle_folder
from coreach.runtime.latency import run_runtime_bench


def run(cfg: DictConfig) -> dict:
    """Latency of `cfg.bundle`'s runtime session against a bare onnxruntime call, in one run."""
    bundle = "" if OmegaConf.is_missing(cfg, "bundle") else str(cfg.bundle)
    if not bundle:
        raise ConfigError("option bundle", "expected a release bundle folder (releases/<name>/v<version>) or a "
                                           "released model as NAME@ALIAS or NAME/VERSION")  # fmt: skip
    folder = bundle_folder(bundle, uri=cfg.get("tracking", {}).get("uri"))
    for key in ("steps", "warmup"):
        if int(cfg[key]) < (1 if key == "steps" else 0):
            raise ConfigError(f"option {key}", f"expected a positive integer, got {cfg[key]!r}")
    if not float(cfg.dt) > 0:
        raise ConfigError("option dt", f"expected a control period > 0 s, got {cfg.dt!r}")
    out = run_runtime_bench(folder, steps=int(cfg.steps), dt=float(cfg.dt), warmup=int(cfg.warmup))
    return {"bundle": str(folder.resolve()), **out}
