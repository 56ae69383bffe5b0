"""The belief update cadence shared by training replay, vetting and the runtime: updates from an anchor pose.

The belief is updated once the tool has moved `min_motion` from where the last update left it (the anchor),
not from the previous control step: at a high control rate a single step may move less than min_motion,
and slow motion must still count. With floor = 0 the update telescopes, so the belief is the same at any
control rate. Array-API code, batched over [B].
"""

from __future__ import annotations

from coreach.control.arrays import namespace


def track(belief_model, belief, anchor, pos, goal_targets):
    """One control step: belief [B, G], anchor [B, 3] (tool position at the last update), tool position
    pos [B, 3], goal_targets [B, G, S, 3] -> (belief, anchor, updated [B])."""
    xp = namespace(belief, anchor, pos)
    step = pos - anchor
    moved = xp.sum(step * step, axis=-1) >= belief_model.min_motion**2  # [B], the same test as the model's
    # the model's own min_motion test on (anchor, pos) is the same test, so rows not moved keep their belief
    belief = belief_model.update(belief, anchor, pos, goal_targets)
    anchor = xp.where(moved[:, None], pos, anchor)
    return belief, anchor, moved
