"""Contract checks an outside package can run on its own plugins: `check_plugin(kind, obj_or_config)`.

Each kind has a list of named checks (`plugin_checks` yields them as (name, callable) pairs for test
parametrisation); `check_plugin` runs them all and raises ContractError naming the first failed check in one
line. A plugin is given either built or as its config ({"_target_": ..., ...}), built the way coreach builds it.
"""

from __future__ import annotations

import inspect
import json
import math
from collections.abc import Callable, Iterator
from typing import Any

import hydra
import numpy as np
import torch
from omegaconf import DictConfig, OmegaConf

from coreach.context import ContextSpec
from coreach.decoder.policy import DecoderPolicy
from coreach.errors import CoreachError
from coreach.host.protocols import KINDS, OPTIONAL, Posterior, optional_members
from coreach.host.registry import build_plugin, builtin_option
from coreach.safety import SafetyLimits
from coreach.training.terms import TermBatch

# sizes of the small problems the checks build: a 7-joint arm context with 4 goals
N_JOINTS, N_GOALS, BATCH = 7, 4, 6


class ContractError(CoreachError):
    """A plugin failed a contract check; `where` names the plugin and the check."""


# ------------------------------------------------------------------------------------------------ building


def _is_config(x: Any) -> bool:
    return isinstance(x, (dict, DictConfig)) and "_target_" in x


def _model_width(cfg) -> int:
    blocks = getattr(hydra.utils.get_class(str(cfg["_target_"])), "context_blocks", ())
    return len(ContextSpec(dof=N_JOINTS, n_goals=N_GOALS).columns(blocks))


def build(kind: str, obj_or_config: Any, seed: int = 0) -> Any:
    """The plugin itself, or built from its config as coreach does (decoders get action_dim and context_dim of a
    7-joint arm with 4 goals)."""
    if not _is_config(obj_or_config):
        return obj_or_config

    cfg = OmegaConf.create(obj_or_config if isinstance(obj_or_config, dict) else
                           OmegaConf.to_container(obj_or_config))  # fmt: skip
    if kind == "model":
        torch.manual_seed(seed)
        return build_plugin(cfg, kind, action_dim=N_JOINTS, context_dim=_model_width(cfg))
    return build_plugin(cfg, kind)


def _fail(what: str, cond: bool, message: str) -> None:
    if not cond:
        raise AssertionError(f"{what}: {message}")


# ------------------------------------------------------------------------------------------- shared checks


def check_protocol(kind: str, obj: Any) -> None:
    """The object implements its kind's protocol (every required member is present)."""
    proto = KINDS[kind]
    missing = [m for m in dir(proto) if not m.startswith("_") and not hasattr(obj, m)]
    _fail("protocol", not missing and isinstance(obj, proto), f"missing members {missing}")


def check_optional_members(kind: str, obj: Any) -> None:
    """Optional members the plugin defines are of the declared kind: methods callable with the declared
    parameters, attributes of the declared type (see coreach.host.protocols.OPTIONAL)."""
    proto = OPTIONAL.get(kind)
    if proto is None:
        return
    hints = getattr(proto, "__annotations__", {})
    for name in optional_members(kind):
        if not hasattr(obj, name):
            continue
        value = getattr(obj, name)
        if name in hints:  # attribute: int or float as declared
            want = int if "int" in str(hints[name]) else float
            ok = isinstance(value, (int, float)) and not isinstance(value, bool) and math.isfinite(value)
            _fail(name, ok and (want is float or isinstance(value, int)) and value >= 0,
                  f"expected a non-negative {want.__name__}, got {value!r}")
            continue
        _fail(name, callable(value), "expected a method")
        declared = [p for p in inspect.signature(getattr(proto, name)).parameters if p not in ("self", "cls")]
        have = inspect.signature(value).parameters
        if kind == "operator" and name == "reset":
            if "dt" in have:  # the optional form: dt as a keyword with a default
                _fail("reset", have["dt"].default is not inspect.Parameter.empty, "dt needs a default")
            continue
        variadic = any(q.kind in (q.VAR_POSITIONAL, q.VAR_KEYWORD) for q in have.values())
        _fail(name, variadic or len(have) >= len(declared), f"expected parameters {declared}, got {list(have)}")


# ------------------------------------------------------------------------------------------------- robot


def _q(robot, n: int = 5, seed: int = 0) -> torch.Tensor:
    lo, hi = robot.q_lower.double(), robot.q_upper.double()
    lo = torch.where(torch.isfinite(lo), lo, torch.full_like(lo, -math.pi))
    hi = torch.where(torch.isfinite(hi), hi, torch.full_like(hi, math.pi))
    g = torch.Generator().manual_seed(seed)
    return lo + (hi - lo) * (0.1 + 0.8 * torch.rand(n, robot.dof, generator=g, dtype=torch.float64))


def robot_limits(robot) -> None:
    """dof is a positive int; limits are [n] with lower <= upper, speeds > 0 and home inside the limits."""
    n = robot.dof
    _fail("dof", isinstance(n, int) and n > 0, f"expected a positive int, got {n!r}")
    for name in ("q_lower", "q_upper", "qd_max", "q_home"):
        _fail(name, tuple(getattr(robot, name).shape) == (n,), f"expected shape ({n},)")
    _fail("limits", bool((robot.q_lower <= robot.q_upper).all()), "q_lower > q_upper somewhere")
    _fail("qd_max", bool((robot.qd_max > 0).all()), "joint speed limits must be > 0")
    inside = (robot.q_home >= robot.q_lower) & (robot.q_home <= robot.q_upper)
    _fail("q_home", bool(inside.all()), "home pose outside the joint limits")
    _fail("joint_names", len(robot.joint_names) == n, f"expected {n} joint names")


def robot_fk(robot) -> None:
    """fk gives [B, 3] positions and proper rotations (R^T R = I, det R = +1), in q's dtype."""
    q = _q(robot)
    pos, rot = robot.fk(q)
    _fail("fk", tuple(pos.shape) == (len(q), 3) and tuple(rot.shape) == (len(q), 3, 3), "wrong shapes")
    _fail("fk", pos.dtype == q.dtype, f"output dtype {pos.dtype} != input {q.dtype}")
    eye = torch.eye(3, dtype=rot.dtype).expand_as(rot)
    _fail("fk", torch.allclose(rot.transpose(-1, -2) @ rot, eye, atol=1e-9), "rotation not orthonormal")
    _fail("fk", torch.allclose(torch.linalg.det(rot), torch.ones(len(q), dtype=rot.dtype), atol=1e-9),
          "rotation determinant is not +1")  # fmt: skip


def robot_jacobian(robot) -> None:
    """The Jacobian's linear rows match central differences of fk positions (step 1e-6 rad, tol 1e-5)."""
    q = _q(robot, n=3)
    jac = robot.jacobian(q)
    _fail("jacobian", tuple(jac.shape) == (len(q), 6, robot.dof), f"expected shape ({len(q)}, 6, {robot.dof})")
    h = 1e-6
    for j in range(robot.dof):
        dq = torch.zeros_like(q)
        dq[:, j] = h
        fd = (robot.fk(q + dq)[0] - robot.fk(q - dq)[0]) / (2 * h)
        _fail("jacobian", torch.allclose(jac[:, :3, j], fd, atol=1e-5), f"column {j} differs from fk differences")


def robot_fk_and_jacobian(robot) -> None:
    """If present, fk_and_jacobian returns what fk and jacobian return."""
    if not hasattr(robot, "fk_and_jacobian"):
        return
    q = _q(robot, n=3)
    pos, rot, jac = robot.fk_and_jacobian(q)
    p2, r2 = robot.fk(q)
    ok = torch.allclose(pos, p2, atol=1e-12) and torch.allclose(rot, r2, atol=1e-12)
    _fail("fk_and_jacobian", ok and torch.allclose(jac, robot.jacobian(q), atol=1e-12), "differs from fk/jacobian")


def robot_urdf_text(robot) -> None:
    """If present, urdf_text returns None or text holding a <robot> element."""
    if not hasattr(robot, "urdf_text"):
        return
    text = robot.urdf_text()
    _fail("urdf_text", text is None or (isinstance(text, str) and "<robot" in text), "expected URDF text or None")


def robot_link_model(robot) -> None:
    """If present, link_model returns spheres on named links with positive radii and self pairs of sphere
    indices, all finite."""
    if not hasattr(robot, "link_model"):
        return
    m = robot.link_model(0.02)
    S = len(m.links)
    ok = (np.asarray(m.centres).shape == (S, 3) and np.asarray(m.radii).shape == (S,) and bool(np.isfinite(m.centres).all())
          and bool((np.asarray(m.radii) > 0).all()))
    pairs = np.asarray(m.self_pairs).reshape(-1, 2)
    _fail("link_model", ok and bool(((pairs >= 0) & (pairs < S)).all()),
          "expected centres [S, 3], radii [S] > 0 and self pairs of sphere indices")


# ------------------------------------------------------------------------------------------------ belief


def _belief_problem(xp):
    g = np.random.default_rng(0)
    before = g.normal(0.4, 0.05, (BATCH, 3))
    after = before + g.normal(0.0, 0.02, (BATCH, 3))
    targets = before[:, None, None, :] + g.normal(0.0, 0.3, (BATCH, N_GOALS, 1, 3))
    targets = np.concatenate([targets, targets + 0.05], axis=2)  # [B, G, 2, 3]
    return tuple(xp(a) for a in (before, after, targets))


def belief_distribution(belief) -> None:
    """initial is uniform-summing [B, G]; update keeps [B, G] rows non-negative and summing to 1."""
    like = np.zeros(1)
    b0 = np.asarray(belief.initial(BATCH, N_GOALS, like))
    _fail("initial", b0.shape == (BATCH, N_GOALS) and np.allclose(b0.sum(-1), 1.0), "expected [B, G] rows summing to 1")
    post = np.asarray(belief.update(b0, *_belief_problem(np.asarray)))
    _fail("update", post.shape == (BATCH, N_GOALS), f"expected shape {(BATCH, N_GOALS)}, got {post.shape}")
    _fail("update", bool(np.isfinite(post).all() and (post >= 0).all()), "non-finite or negative probabilities")
    _fail("update", bool(np.allclose(post.sum(-1), 1.0, atol=1e-9)), "rows do not sum to 1")


def belief_numpy_torch(belief) -> None:
    """update gives the same posterior on numpy arrays and torch tensors (the runtime uses numpy)."""
    b0 = np.asarray(belief.initial(BATCH, N_GOALS, np.zeros(1)))
    a = np.asarray(belief.update(b0, *_belief_problem(np.asarray)))
    t = belief.update(torch.from_numpy(b0.copy()), *_belief_problem(torch.from_numpy))
    _fail("update", isinstance(t, torch.Tensor) and np.allclose(a, t.numpy(), atol=1e-12), "numpy and torch differ")


def belief_manifest(belief) -> None:
    """If present, to_manifest is plain JSON with a "model" name, and from_manifest rebuilds an equal model."""
    if not hasattr(belief, "to_manifest"):
        return

    section = belief.to_manifest()
    _fail("to_manifest", isinstance(section, dict) and isinstance(section.get("model"), str), "needs a 'model' name")
    _fail("to_manifest", json.loads(json.dumps(section)) == section, "not plain JSON")
    params = {k: v for k, v in section.items() if k != "model"}
    again = type(belief).from_manifest(params)
    b0 = np.asarray(belief.initial(BATCH, N_GOALS, np.zeros(1)))
    problem = _belief_problem(np.asarray)
    same = np.allclose(np.asarray(belief.update(b0, *problem)), np.asarray(again.update(b0, *problem)), atol=0)
    _fail("from_manifest", same and again.to_manifest() == section, "the rebuilt model differs")


# ----------------------------------------------------------------------------------------- model (decoder)


def _decoder_inputs(model, seed: int = 1):
    g = torch.Generator().manual_seed(seed)
    width = model_context_width(model)
    return torch.randn(BATCH, N_JOINTS, generator=g), torch.randn(BATCH, width, generator=g)


def model_context_width(model) -> int:
    return len(ContextSpec(dof=N_JOINTS, n_goals=N_GOALS).columns(model.context_blocks))


def model_shapes(model) -> None:
    """encode gives a Posterior of [B, latent_dim]; decode gives [B, n]; everything finite; an nn.Module."""
    _fail("module", isinstance(model, torch.nn.Module), "a decoder is a torch.nn.Module")
    action, context = _decoder_inputs(model)
    post = model.encode(action, context)
    _fail("encode", isinstance(post, Posterior), "expected a coreach.host.protocols.Posterior")
    _fail("encode", tuple(post.mean.shape) == (BATCH, model.latent_dim), "mean shape is not [B, latent_dim]")
    _fail("encode", post.logvar is None or tuple(post.logvar.shape) == (BATCH, model.latent_dim), "logvar shape")
    out = model.decode(post.mean, context)
    _fail("decode", tuple(out.shape) == (BATCH, N_JOINTS), f"expected shape {(BATCH, N_JOINTS)}")
    finite = torch.isfinite(post.mean).all() and torch.isfinite(out).all()
    _fail("finite", bool(finite) and (post.logvar is None or bool(torch.isfinite(post.logvar).all())), "NaN/inf")


def model_gradients(model) -> None:
    """Every parameter gets a finite, non-zero gradient through encode -> (sample) -> decode."""
    action, context = _decoder_inputs(model)
    model.zero_grad()
    post = model.encode(action, context)
    latent, loss = post.mean, torch.zeros(())
    if post.logvar is not None:  # the reparameterised sample is how the log-variance head gets trained
        latent = latent + torch.exp(0.5 * post.logvar) * torch.randn_like(latent)
        loss = loss + post.logvar.pow(2).sum()
    (loss + model.decode(latent, context).pow(2).sum()).backward()
    for name, p in model.named_parameters():
        _fail("gradients", p.grad is not None, f"no gradient reaches {name}")
        _fail("gradients", bool(torch.isfinite(p.grad).all() and p.grad.abs().sum() > 0), f"zero/NaN at {name}")
    model.zero_grad()


# -------------------------------------------------------------------------------------------------- loss


def loss_batch(seed: int = 0):
    """A TermBatch from a real DecoderPolicy (the built-in cVAE, small) with the real speed caps; epoch is far
    past any warm-up so no term is switched off."""
    g = torch.Generator().manual_seed(seed)
    spec = ContextSpec(dof=N_JOINTS, n_goals=N_GOALS)
    torch.manual_seed(seed)
    cfg = builtin_option("model", "cvae")
    cfg.hidden = [32, 32]
    width = _model_width(cfg)
    decoder = build_plugin(cfg, "model", action_dim=N_JOINTS, context_dim=width)
    policy = DecoderPolicy(decoder, {}, spec, N_JOINTS)
    raw_context = torch.randn(BATCH, spec.width, generator=g)
    context = policy.normalise_context(raw_context)
    action = torch.randn(BATCH, N_JOINTS, generator=g)
    post = decoder.encode(action, context)
    latent = post.mean + torch.exp(0.5 * post.logvar) * torch.randn(post.mean.shape, generator=g)
    ee_pos = torch.tensor([0.4, 0.0, 0.4]) + 0.05 * torch.randn(BATCH, 3, generator=g)
    approach = ee_pos[:, None, :] + 0.3 * torch.randn(BATCH, N_GOALS, 3, generator=g)  # [B, G, 3]
    return TermBatch(
        action=action, context=context, posterior=post, latent=latent,
        reconstruction=decoder.decode(latent, context), policy=policy, raw_context=raw_context,
        jac_lin=0.3 * torch.randn(BATCH, 3, N_JOINTS, generator=g), ee_pos=ee_pos,
        goal_targets=torch.stack([approach, approach + 0.05], dim=2),  # [B, G, 2, 3]
        belief=torch.full((BATCH, N_GOALS), 1.0 / N_GOALS),
        limits=SafetyLimits(qd_max=(1.5,) * N_JOINTS, tcp_speed_max=0.25), dt=0.05, epoch=1000, global_step=7,
    )  # fmt: skip


def loss_scalar(term) -> None:
    """The term's value is a finite scalar tensor."""
    value = term(loss_batch())
    _fail("value", isinstance(value, torch.Tensor) and value.dim() == 0, "expected a scalar tensor")
    _fail("value", bool(torch.isfinite(value)), f"not finite: {value}")


def loss_differentiable(term) -> None:
    """Gradients reach the policy's parameters, finite and not all zero."""
    batch = loss_batch()
    term(batch).backward()
    grads = [p.grad for p in batch.policy.parameters() if p.grad is not None]
    _fail("gradient", bool(grads), "no parameter of the policy receives a gradient")
    _fail("gradient", all(bool(torch.isfinite(g).all()) for g in grads), "non-finite gradient")
    _fail("gradient", any(bool(g.abs().sum() > 0) for g in grads), "all gradients are zero")


def loss_weight(term) -> None:
    """weight is a finite float and name a non-empty string (the logging key)."""
    _fail("weight", isinstance(term.weight, float) and math.isfinite(term.weight), f"got {term.weight!r}")
    _fail("name", isinstance(term.name, str) and bool(term.name), f"got {term.name!r}")


# ------------------------------------------------------------------------------------ interface, operator


def interface_modes(interface) -> None:
    """n_modes is a positive int and name a string."""
    m = interface.n_modes
    _fail("n_modes", isinstance(m, int) and not isinstance(m, bool) and m >= 1, f"expected an int >= 1, got {m!r}")
    _fail("name", isinstance(interface.name, str), f"got {interface.name!r}")


def operator_choose(operator) -> None:
    """After reset, choose returns [E] indices into M*K candidates (-1 = no input yet) for several steps, and
    perturb returns a finite [E, 2] stick."""
    E, M, K = 4, 2, 9
    g = torch.Generator().manual_seed(0)
    if "dt" in inspect.signature(operator.reset).parameters:
        operator.reset(E, g, dt=0.05)
    else:
        operator.reset(E, g)
    for step in range(6):  # past any reaction delay
        value = torch.randn(E, M, K, generator=g, dtype=torch.float64)
        idx = operator.choose(value, step, g)
        ok = isinstance(idx, torch.Tensor) and tuple(idx.shape) == (E,) and not idx.is_floating_point()
        ok = ok and bool(((idx >= -1) & (idx < M * K)).all())
        _fail("choose", ok, f"step {step}: expected [E] integer indices in [-1, M*K)")
    _fail("choose", bool((idx >= 0).all()), "still no input after 6 steps")
    stick = operator.perturb(torch.zeros(E, 2, dtype=torch.float64), 0, g)
    _fail("perturb", tuple(stick.shape) == (E, 2) and bool(torch.isfinite(stick).all()), "expected a finite [E, 2]")


# -------------------------------------------------------------------------------------------------- table

CHECKS: dict[str, list[Callable[[Any], None]]] = {
    "robot": [robot_limits, robot_fk, robot_jacobian, robot_fk_and_jacobian, robot_urdf_text, robot_link_model],
    "belief": [belief_distribution, belief_numpy_torch, belief_manifest],
    "model": [model_shapes, model_gradients],
    "loss": [loss_scalar, loss_differentiable, loss_weight],
    "interface": [interface_modes],
    "operator": [operator_choose],
    "dataset": [],
    "labeller": [],
}
"""Per kind, its behaviour checks after the shared protocol and optional-member checks."""


def plugin_checks(kind: str, obj_or_config: Any) -> Iterator[tuple[str, Callable[[], None]]]:
    """(check name, callable) for every check of `kind`; each callable raises AssertionError on failure.

    The plugin is built once, lazily, on the first call, so listing checks costs nothing.
    """
    if kind not in KINDS:
        raise ContractError("check_plugin", f"unknown plugin kind {kind!r}; expected one of {sorted(KINDS)}")
    built: list[Any] = []

    def plugin():
        if not built:
            built.append(build(kind, obj_or_config))
        return built[0]

    yield "protocol", lambda: check_protocol(kind, plugin())
    yield "optional_members", lambda: check_optional_members(kind, plugin())
    for fn in CHECKS[kind]:
        yield fn.__name__, (lambda fn=fn: fn(plugin()))


def check_plugin(kind: str, obj_or_config: Any) -> None:
    """Run every contract check of `kind` on a plugin (object or config); ContractError names the first failure."""
    label = obj_or_config.get("_target_") if _is_config(obj_or_config) else type(obj_or_config).__name__
    for name, check in plugin_checks(kind, obj_or_config):
        try:
            check()
        except AssertionError as exc:
            raise ContractError(f"{kind} plugin {label}", f"check {name} failed: {exc}") from None
