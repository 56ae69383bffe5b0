"""The scene's bodies and the arm's link model put together for one robot: what every stage keeps clear."""

from __future__ import annotations

import numpy as np

from coreach.control.bodies import pack, point_distances
from coreach.control.separation import measure
from coreach.errors import ConfigError, DataError
from coreach.runtime.arm_world import ArmWorld, contact_report
from coreach.runtime.kinematics import Chain
from coreach.world.scenario import Scenario

__all__ = ["arm_world", "check_episodes_clear"]


def arm_world(robot, scenario: Scenario, speed_cap: float = 0.25) -> ArmWorld | None:
    """ArmWorld of `robot` in `scenario`, or None when the scene has no bodies. ConfigError (one line) when
    the robot has no link model, or when the person's reduced-speed zone reaches the arm's base."""
    if not scenario.has_bodies:
        return None
    make = getattr(robot, "link_model", None)
    urdf_text = getattr(robot, "urdf_text", None)
    if make is None or urdf_text is None:
        raise ConfigError(f"robot {getattr(robot, 'name', robot)}",
                          f"scene {scenario.name} has bodies but the robot has no link model (a URDF arm has one)")
    model = make(scenario.separation.clearance)
    if not len(model.links):
        raise ConfigError(f"robot {robot.name}", "the URDF has no <collision> geometry on any moving link; add it "
                                                 "or give robot.collision_override")  # fmt: skip
    chain = Chain.from_string(urdf_text(), robot.tool_link)
    if scenario.person:
        # the arm's base: the origin of its first moving joint, which nothing in the filter can move away
        base = chain._frames(np.zeros(chain.dof))[0][0, :3, 3]
        zone = scenario.separation.reduced_zone(speed_cap)
        d, _ = point_distances(base[None], pack(scenario.person))
        if (d < zone).any():
            o = int(np.argmin(d[0]))
            raise ConfigError(f"scenario {scenario.name}, person {scenario.person[o].name}",
                              f"the person's reduced-speed zone ({zone:.3f} m) reaches the arm's base "
                              f"(distance {d[0, o]:.3f} m); move the person or the arm")  # fmt: skip
    return ArmWorld.build(chain, model.links, model.centres, model.radii, model.self_pairs, scenario.obstacles,
                          scenario.person, scenario.separation)


def check_episodes_clear(robot, scenario: Scenario, paths: list, goals: list[str], what: str) -> None:
    """DataError naming the goal, the share of its episodes and the body, when any episode's joint path
    (paths: [T, n] arrays, goals: each episode's goal name) has a link inside furniture, two non-adjacent links
    overlapping, or a link inside the person's keep-out zone."""
    world = arm_world(robot, scenario)
    if world is None or not paths:
        return
    lengths = [len(p) for p in paths]
    centres, _ = world.spheres(np.concatenate(paths), jacobian=False)
    keep_out = world.world.protective(furniture=0.0)
    touching, body = contact_report(world.world, measure(world.world, centres, None, keep_out))
    bad: dict[str, list] = {}
    start = 0
    for g, T in zip(goals, lengths):
        t, b = touching[start:start + T], body[start:start + T]
        start += T
        bad.setdefault(g, [0, 0, {}])
        bad[g][1] += 1
        if t.any():
            bad[g][0] += 1
            name = "another link" if b[t][0] < 0 else world.world.body_names[int(b[t][0])]
            bad[g][2][name] = bad[g][2].get(name, 0) + 1
    for g, (n_bad, n, names) in bad.items():
        if n_bad:
            worst = max(names, key=names.get)
            raise DataError(f"{what}, goal {g}",
                            f"{n_bad / n:.1%} of its episodes ({n_bad} of {n}) bring a link into {worst}; "
                            "no episode that touches a body is accepted (move the body, the goal or the start)")
