"""Why vetting episodes fail: success per goal and switch cell, one cause per failed episode, and what to fix.

Each failed episode gets one cause, read from its last `window_s` seconds (after any goal switch) in this
order, the first rule that holds winning:
1. limited       the joint-position limit turned the command on at least `limited_share` of the window's
                 steps (a speed cap only shortens a command, so it alone is no cause: it shows as slow);
2. progressing   the distance to the operator's current waypoint fell by at least `progress_m`, or the
                 approach pose was first reached inside the window: the horizon ran out, not the way;
3. pressed       the separation step of the safety filter scaled the applied command on at least
                 `separation_held_share` of the window's steps, and on at least that share of the window's
                 states the closest link to furniture or between two links was within the scene's clearance
                 plus `pressed_margin_m`: the arm ends pushed against a body;
4. separation_held  the separation step scaled the command on at least `separation_held_share` of the
                 window's steps, the arm not pressed against furniture (held short of the person's zone, say);
5. no_way        on more than `no_way_share` of the window's steps no candidate stick brought the tool
                 closer to the final goal's approach point: the decoder offers no way there from here;
6. stuck         the tool moved slower than `stuck_speed` on average;
7. oscillating   the tool's path was `oscillation_ratio` times longer than its net displacement;
8. otherwise the furthest stage reached on the final goal: fine_motion (approach pose reached, fine motion
   not completed), orientation (approach position reached, never with the orientation), approach
   (never within the position tolerance of the approach point: the arm moves, but not there).
Rules 3 and 4 come before no_way and stuck because a held arm looks like both (the loop's candidates go
through the same filter, so none makes progress, and the tool barely moves): the hold is the better lead.
They read the loop's separation extras (`limits` with the SEPARATION bit, `sep_furniture`, `sep_self`,
`world`); a record without them (no bodies in the scene, older records) never meets them.
The stage is kept beside the cause for every failed episode, so "stuck at the approach pose" and "stuck on
the way" stay apart.

Per goal, `reach` is the share of visited states from which some candidate stick brings the tool closer to
that goal's approach point (the decoder's coverage of the stick box, as the operator sees it).
"""

from __future__ import annotations

import math
from dataclasses import asdict, dataclass, fields

import torch
from torch import Tensor

from coreach.errors import ConfigError
from coreach.vetting.loop import JOINT_LIMIT, SEPARATION, SPEED_CAP
from coreach.vetting.rates import rate, visited_steps
from coreach.vetting.records import RolloutRecord

NEEDED = ("goal_targets", "phase1_step", "position_tol")  # the vetting loop's extras a diagnosis reads

__all__ = ["NEEDED", "CAUSES", "STAGES", "DiagnosisRules", "classify", "diagnose", "advice", "flat_diagnosis", "without_episodes"]

# cause key -> what a report says
CAUSES = {
    "limited": "held back by a safety limit (joint position)",
    "progressing": "still progressing at the horizon",
    "pressed": "pressed against an obstacle",
    "separation_held": "held by the separation filter",
    "no_way": "no stick input leads toward the goal",
    "stuck": "stuck (no motion)",
    "oscillating": "circling or oscillating",
    "fine_motion": "fine motion not completed",
    "orientation": "reached the position, not the orientation",
    "approach": "never reached the approach position",
}
STAGES = {
    "none": "never within the position tolerance of the approach point",
    "position": "approach position reached, orientation not",
    "approach_pose": "approach pose reached, fine motion not completed",
}

# What each cause usually points to: data (what the demonstrations cover), model (capacity, epochs, stick
# scaling), loss (KL and goal entropy term weights), or the scene and limits. A reading aid, not a verdict.
_FIXES = {
    "limited": ("data", "the arm ends pressed against a joint limit: the decoder drove it out of the region the "
                "demonstrations cover and offers no way back (start spread, `coreach aggregate`); check the "
                "goals' joint margins with the demonstrator"),
    "pressed": ("data / scene", "the arm ends pushed against furniture (or one link against another) and the "
                "separation filter holds it there: the decoded motion leads into the body rather than around it; "
                "demonstrations that pass the body near where these episodes end, or a goal whose approach "
                "runs too close to it (`coreach check-reach`)"),
    "separation_held": ("scene / data", "the separation filter holds the arm short of its way, not against "
                        "furniture: usually near the person's reduced-speed zone; the way to the goal passes "
                        "close to the person (check the layout), or demonstrations that keep further from them"),
    "no_way": ("data / loss", "where these episodes end, every stick input leads away from the goal: the arm "
               "left the states the demonstrations cover (start spread, `coreach aggregate`), or the goal entropy "
               "term's weight is too low to keep the goal reachable"),
    "stuck": ("model / loss", "the arm stops although a stick input toward the goal exists: the decoded "
              "motion is too small near here (stick_gain, KL weight) or the operator's best choice is to wait"),
    "progressing": ("model", "the arm is on its way but slow: stick scaling or speed of the decoded motion, "
                    "or a horizon too short for the scene (compare time to success with the baselines)"),
    "oscillating": ("model / data", "the action map flips direction near where episodes end: more epochs or "
                    "capacity, and demonstrations that settle at the goal"),
    "fine_motion": ("data", "the goal's fine motion is not decoded once there: check demonstrations of the "
                    "fine motion and the belief on the goal at the approach pose"),
    "orientation": ("data / model", "the stick gives little rotation near the goal: demonstrations with "
                    "orientation corrections near the approach pose, or more latent dimensions"),
    "approach": ("data", "the arm moves but not to the goal: these states lie outside what the demonstrations "
                 "cover (start spread, `coreach aggregate`), or the latent does not span that direction (loss)"),
}


@dataclass(frozen=True)
class DiagnosisRules:
    """Thresholds of the cause rules (common practice for this scene's speeds, not a standard)."""

    window_s: float = 3.0  # s at the end of an episode that the rules read
    limited_share: float = 0.5  # share of window steps turned by the joint-position limit
    no_way_share: float = 0.5  # share of window steps with no candidate stick toward the final goal
    stuck_speed: float = 0.005  # m/s mean tool speed: 0.1 of the slowest demonstrated approach speed here
    progress_m: float = 0.01  # m the distance to the waypoint must fall within the window
    oscillation_ratio: float = 3.0  # path length / net displacement in the window
    low_reach: float = 0.8  # a goal reachable from fewer visited states than this is flagged
    # share of window steps on which the separation step scaled the command: "most steps" (chosen here, the
    # same majority as the joint-limit rule)
    separation_held_share: float = 0.5
    # m above the scene's clearance within which a link counts as pressed against a body: the filter holds a
    # pushing link at the clearance (within 0.3 mm for the shoulder driven into the shelf, in the tests); 5 mm
    # leaves room for an arm that slides along the surface while pushing (chosen here)
    pressed_margin_m: float = 0.005

    @classmethod
    def coerce(cls, value) -> DiagnosisRules:
        if value is None:
            return cls()
        if isinstance(value, cls):
            return value
        known = {f.name for f in fields(cls)}
        try:
            items = {k: float(v) for k, v in dict(value).items() if k in known}
        except (TypeError, ValueError) as err:
            raise ConfigError("diagnosis", f"expected a mapping of numbers ({', '.join(sorted(known))}): {err}") from None
        for k, v in items.items():
            if not math.isfinite(v) or v <= 0:
                raise ConfigError(f"diagnosis.{k}", f"expected a finite number > 0, got {v}")
        return cls(**items)


def _final_segment_start(record: RolloutRecord) -> Tensor:
    """[E] first step at which the operator wants its final goal (the switch step, or 0)."""
    return record.switch_step.clamp_min(0)


def classify(record: RolloutRecord, rules: DiagnosisRules | None = None) -> dict[str, Tensor | list]:
    """Cause and stage of every episode ('' for successes), plus the window measures they were read from.

    Needs the loop's extras goal_targets [E, G, 2, 3], phase1_step [E] and position_tol (m); reads limits
    [E, T] (which safety limit acted), reach_goal [E, T, G], and sep_furniture, sep_self [E, T+1] with world
    (the scene's clearance) when present.
    """
    rules = rules or DiagnosisRules()
    ex = record.extras
    missing = [k for k in NEEDED if k not in ex]
    if missing:
        raise ConfigError(f"record {record.interface}/{record.suite}", f"extras lack {missing} for a diagnosis")
    E, T = record.limit_scaled.shape
    rows = torch.arange(E)
    path = record.ee_path.to(torch.float64)  # [E, T+1, 3]
    W = max(1, min(T, int(round(rules.window_s / record.dt))))
    begin = torch.clamp(torch.full((E,), T - W), min=0)
    begin = torch.maximum(begin, _final_segment_start(record))  # read only what happened for the final goal
    span = (T - begin).clamp_min(1)  # [E] transitions in the window

    t = torch.arange(T)[None, :]
    in_win = (t >= begin[:, None]) & (t < T)  # [E, T] transitions t -> t+1
    seg = (path[:, 1:] - path[:, :-1]).norm(dim=-1)  # [E, T]
    length = (seg * in_win).sum(-1)  # [E] m
    net = (path[rows, T] - path[rows, begin]).norm(dim=-1)  # [E] m
    speed = length / (span * record.dt)
    bits = ex.get("limits")
    joint = (bits & JOINT_LIMIT) > 0 if bits is not None else record.limit_scaled  # older records: any limit
    limited = (joint & in_win).sum(-1).to(torch.float64) / span
    capped = ((bits & SPEED_CAP) > 0 if bits is not None else torch.zeros_like(joint)) & in_win
    held, near, closest = _separation_window(ex, in_win, span, rules)
    reach = ex.get("reach_goal")
    if reach is not None:
        toward = reach.gather(2, record.goal_final[:, None, None].expand(E, T, 1))[..., 0]  # [E, T]
        no_way = (~toward & in_win).sum(-1).to(torch.float64) / span
    else:
        no_way = torch.zeros(E, dtype=torch.float64)
    err = record.error.to(torch.float64)
    drop = err[rows, begin] - err[rows, T]  # [E] m; a jump to the fine motion's waypoint is rule 2's other half
    phase1 = ex["phase1_step"]
    reached_in_window = phase1 >= begin

    # the stage on the final goal: nearest approach after the switch, and the approach pose itself
    approach = ex["goal_targets"].to(torch.float64)[rows, record.goal_final, 0]  # [E, 3]
    dist = (path - approach[:, None, :]).norm(dim=-1)  # [E, T+1]
    after = torch.arange(T + 1)[None, :] >= _final_segment_start(record)[:, None]
    nearest = torch.where(after, dist, torch.inf).amin(-1)
    stage_pose = phase1 >= 0
    stage_pos = nearest < float(ex["position_tol"])

    cause, stage = [], []
    for e in range(E):
        if bool(record.success[e]):
            cause.append("")
            stage.append("")
            continue
        stage.append("approach_pose" if stage_pose[e] else "position" if stage_pos[e] else "none")
        if limited[e] >= rules.limited_share:
            c = "limited"
        elif drop[e] >= rules.progress_m or reached_in_window[e]:
            c = "progressing"
        elif held[e] >= rules.separation_held_share and near[e] >= rules.separation_held_share:
            c = "pressed"
        elif held[e] >= rules.separation_held_share:
            c = "separation_held"
        elif no_way[e] > rules.no_way_share:
            c = "no_way"
        elif speed[e] < rules.stuck_speed:
            c = "stuck"
        elif length[e] >= rules.oscillation_ratio * net[e]:
            c = "oscillating"
        else:
            c = {"approach_pose": "fine_motion", "position": "orientation", "none": "approach"}[stage[-1]]
        cause.append(c)
    return {"cause": cause, "stage": stage, "speed": speed, "limited_share": limited, "drop": drop,
            "no_way_share": no_way, "capped_share": capped.sum(-1).to(torch.float64) / span,
            "path_ratio": length / net.clamp_min(1e-9), "nearest": nearest,
            "end_distance": dist[:, T], "separation_held_share": held, "pressed_share": near,
            "closest_body": closest}  # fmt: skip


def _separation_window(ex: dict, in_win: Tensor, span: Tensor,
                       rules: DiagnosisRules) -> tuple[Tensor, Tensor, Tensor]:  # fmt: skip
    """Per episode over the window: (share of steps the separation step scaled the applied command, share of
    states with a link within clearance + pressed_margin_m of furniture or of another link, closest such
    distance in m). Zeros and inf for records without the separation extras, so their causes do not change."""
    E, T = in_win.shape
    zero = torch.zeros(E, dtype=torch.float64)
    bits = ex.get("limits")
    world = ex.get("world")
    if bits is None or not world or ex.get("sep_furniture") is None or ex.get("sep_self") is None:
        return zero, zero, torch.full((E,), math.inf, dtype=torch.float64)
    held = (((bits.to(torch.int64) & SEPARATION) > 0) & in_win).sum(-1).to(torch.float64) / span
    # states t+1 of the window's transitions: where each step of the window left the arm
    body = torch.minimum(torch.as_tensor(ex["sep_furniture"]), torch.as_tensor(ex["sep_self"]))
    body = body.to(torch.float64)[:, 1:]
    near = ((body <= float(world["clearance"]) + rules.pressed_margin_m) & in_win).sum(-1).to(torch.float64) / span
    closest = torch.where(in_win, body, math.inf).amin(-1)
    return held, near, closest


def _cell_name(fraction: float) -> str:
    return "none" if math.isnan(fraction) else f"{round(fraction * 1000) / 1000:g}"


def diagnose(record: RolloutRecord, level: float = 0.95, rules=None) -> dict:
    """Per goal x switch cell success (intervals at `level`), cause and stage counts, per-goal reach, and
    one row per failure."""
    rules = DiagnosisRules.coerce(rules)
    out = classify(record, rules)
    names = list(record.goal_names)
    cells = [_cell_name(float(f)) for f in record.switch_fraction]
    by_cell: dict[str, dict[str, dict]] = {}
    for g, name in enumerate(names):
        row = {}
        for c in sorted(set(cells), key=lambda c: (c != "none", c)):
            pick = torch.tensor([cells[e] == c and int(record.goal_final[e]) == g for e in range(record.n_episodes)])
            if bool(pick.any()):
                row[c] = asdict(rate(record.success[pick], level))
        by_cell[name] = row

    per_goal = {name: asdict(rate(record.success[record.goal_final == g], level)) for g, name in enumerate(names)
                if bool((record.goal_final == g).any())}  # fmt: skip
    failed = [e for e in range(record.n_episodes) if out["cause"][e]]
    counts = {k: sum(out["cause"][e] == k for e in failed) for k in CAUSES}
    stages = {k: sum(out["stage"][e] == k for e in failed) for k in STAGES}
    visited = visited_steps(record)  # [E, T]
    reach_goal = record.extras.get("reach_goal")
    reach = {}
    if reach_goal is not None:
        for g, name in enumerate(names):
            v = reach_goal[..., g][visited]
            reach[name] = float(v.float().mean()) if v.numel() else float("nan")
    episodes = [{
        "episode": e, "goal_initial": names[int(record.goal_initial[e])], "goal_final": names[int(record.goal_final[e])],
        "switch": cells[e], "cause": out["cause"][e], "stage": out["stage"][e],
        "end_distance_m": float(out["end_distance"][e]), "nearest_m": float(out["nearest"][e]),
        "window_speed_m_s": float(out["speed"][e]), "limited_share": float(out["limited_share"][e]),
        "no_way_share": float(out["no_way_share"][e]), "capped_share": float(out["capped_share"][e]),
        "path_ratio": float(out["path_ratio"][e]),
        "separation_held_share": float(out["separation_held_share"][e]),
        "pressed_share": float(out["pressed_share"][e]),
        # None where nothing was measured (no bodies): JSON has no infinity
        "closest_body_m": float(out["closest_body"][e]) if math.isfinite(float(out["closest_body"][e])) else None,
    } for e in failed]  # fmt: skip
    result = {
        "rules": asdict(rules),
        "per_goal": per_goal,  # success per final goal over all switch cells
        "by_goal_cell": by_cell,
        "failures": len(failed),
        "causes": counts,
        "cause_share": {k: (v / len(failed) if failed else 0.0) for k, v in counts.items()},
        "stages": stages,
        "reach_by_goal": reach,
        "episodes": episodes,
    }
    result["advice"] = advice(result, rules)
    return result


def advice(diag: dict, rules: DiagnosisRules | None = None) -> list[str]:
    """Reading aid: what the commonest causes and the weakest goals point to, most frequent first."""
    rules = rules or DiagnosisRules()
    lines = []
    n = diag["failures"]
    for key, count in sorted(diag["causes"].items(), key=lambda kv: -kv[1]):
        if count == 0 or count < 0.15 * n:
            continue
        where, what = _FIXES[key]
        goals = sorted({r["goal_final"] for r in diag["episodes"] if r["cause"] == key})
        lines.append(f"{CAUSES[key]} ({count} of {n} failures; goals {', '.join(goals)}) -> {where}: {what}")
    for goal, share in diag["reach_by_goal"].items():
        if math.isfinite(share) and share < rules.low_reach:
            lines.append(f"{goal}: some stick input makes progress toward it from only {share:.0%} of visited "
                         "states -> data / loss: the decoder's coverage of that goal is thin")  # fmt: skip
    return lines


def flat_diagnosis(diag: dict) -> dict[str, float]:
    """Scalar diagnosis metrics for MLflow: diagnosis/cause/<key>, diagnosis/success/<goal>/<cell>,
    diagnosis/reach/<goal>."""
    out = {"diagnosis/failures": float(diag["failures"])}
    for k, v in diag["cause_share"].items():
        out[f"diagnosis/cause/{k}"] = float(v)
    for goal, row in diag["by_goal_cell"].items():
        for cell, r in row.items():
            out[f"diagnosis/success/{goal}/{cell}"] = float(r["value"])
            out[f"diagnosis/success_lo/{goal}/{cell}"] = float(r["lo"])
    for goal, share in diag["reach_by_goal"].items():
        if math.isfinite(share):
            out[f"diagnosis/reach/{goal}"] = float(share)
    return out


def without_episodes(diag: dict | None) -> dict | None:
    """A diagnosis without its per-episode rows: what a release summary or a table needs."""
    return None if diag is None else {k: v for k, v in diag.items() if k != "episodes"}
