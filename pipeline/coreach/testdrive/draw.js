// The arm view and the stick keys, shared by the test-drive page and the study page: each page's server
// inlines this file at the marker in its script (testdrive/server.py fill_page). A page defines
// S = {scene, state, bodies, keys, yaw, pitch, zoom} and a canvas with id "view" before it runs.
const el = id => document.getElementById(id);
const esc = t => String(t).replace(/[&<>"']/g, c => ({"&": "&amp;", "<": "&lt;", ">": "&gt;", '"': "&quot;", "'": "&#39;"})[c]);
// scene bodies: furniture in a neutral grey, the person in a colour no goal uses, zones in the person's hues
const FURNITURE_COLOUR = "#8c8478", PERSON_COLOUR = "#7a3fb0", PERSON_FILL = "rgba(122, 63, 176, 0.07)";
const KEEP_OUT_COLOUR = "#9a6fcc", ZONE_COLOUR = "#d2bdea";
const GOAL_COLOURS = ["#d33", "#36c", "#2a2", "#c6c", "#e90", "#0aa", "#963", "#666", "#39f"];

// ---------------------------------------------------------------- input: the gamepad and the keyboard stick
function deadband(v, w) { const m = (Math.abs(v) - w) / (1 - w); return m > 0 ? Math.sign(v) * Math.min(m, 1) : 0; }
// The first gamepad as a deadbanded stick and its buttons (null: none plugged in). `settings`: the axes to
// read, whether a pushed-forward stick reads negative (most pads), the deadband.
const PAD_DEFAULTS = {ax: 0, ay: 1, invertY: true, deadband: 0.1};
function readPad(settings) {
  const pads = navigator.getGamepads ? Array.from(navigator.getGamepads()).filter(p => p) : [];
  if (!pads.length) return null;
  const p = pads[0];
  const x = deadband(p.axes[settings.ax] || 0, settings.deadband);
  const y = deadband(p.axes[settings.ay] || 0, settings.deadband);
  return {id: p.id, stick: [x, settings.invertY ? -y : y],
          pressed: p.buttons.map(b => (typeof b === "object" ? b.pressed : b > 0.5))};
}
// Gamepad first, the keyboard when the pad's stick rests and a key is held: [stick, source]
function chooseStick(pad, keys) {
  const useKeys = !pad || (pad.stick[0] === 0 && pad.stick[1] === 0 && (keys[0] || keys[1]));
  return useKeys ? [keys, "keyboard"] : [pad.stick, "gamepad"];
}
function readKeys() {
  const k = c => S.keys.has(c) ? 1 : 0;
  return [k("ArrowRight") + k("KeyD") - k("ArrowLeft") - k("KeyA"), k("ArrowUp") + k("KeyW") - k("ArrowDown") - k("KeyS")];
}

// ---------------------------------------------------------------- drawing
const view = el("view"), ctx = view.getContext("2d");
function camera() {
  const sc = S.scene, lo = sc.workspace_min.map(v => isFinite(v) ? v : 0), hi = sc.workspace_max.map(v => isFinite(v) ? v : 0.5);
  const centre = [(lo[0] + hi[0]) / 2 * 0.6, (lo[1] + hi[1]) / 2, (lo[2] + hi[2]) / 2 * 0.8];
  const cy = Math.cos(S.yaw), sy = Math.sin(S.yaw), cp = Math.cos(S.pitch), sp = Math.sin(S.pitch);
  const scale = Math.min(view.width, view.height) * 1.3 * S.zoom;
  return {
    // view axes in the world frame (z up): right, up, toward the viewer
    right: [cy, sy, 0], up: [-sy * sp, cy * sp, cp], back: [sy * cp, -cy * cp, sp],
    project(p) {
      const d = [p[0] - centre[0], p[1] - centre[1], p[2] - centre[2]];
      const x = d[0] * this.right[0] + d[1] * this.right[1];
      const y = d[0] * this.up[0] + d[1] * this.up[1] + d[2] * this.up[2];
      const z = d[0] * this.back[0] + d[1] * this.back[1] + d[2] * this.back[2];
      const f = 3.0 / (3.0 - z);  // mild perspective: the camera sits 3 m away
      return [view.width / 2 + scale * f * x, view.height / 2 - scale * f * y];
    },
  };
}
function line(cam, a, b, colour, width, dash) {
  const p = cam.project(a), q = cam.project(b);
  ctx.strokeStyle = colour; ctx.lineWidth = width; ctx.setLineDash(dash || []);
  ctx.beginPath(); ctx.moveTo(p[0], p[1]); ctx.lineTo(q[0], q[1]); ctx.stroke(); ctx.setLineDash([]);
}
function dot(cam, a, r, colour, fill) {
  const p = cam.project(a);
  ctx.beginPath(); ctx.arc(p[0], p[1], r, 0, 2 * Math.PI);
  if (fill) { ctx.fillStyle = colour; ctx.fill(); } else { ctx.strokeStyle = colour; ctx.lineWidth = 2; ctx.stroke(); }
}
const add = (a, b, s) => a.map((v, i) => v + s * b[i]);
const column = (R, j) => [R[0][j], R[1][j], R[2][j]];
function triad(cam, p, R, len, width) {
  ["#d22", "#2a2", "#22d"].forEach((c, j) => line(cam, p, add(p, column(R, j), len), c, width));
}
// ---------------------------------------------------------------- scene bodies
// URDF roll-pitch-yaw (rad) -> body-to-world rotation Rz(yaw) Ry(pitch) Rx(roll), the server's convention
function rpyMatrix(rpy) {
  const [cr, sr, cp, sp, cy, sy] = [Math.cos(rpy[0]), Math.sin(rpy[0]), Math.cos(rpy[1]), Math.sin(rpy[1]),
                                    Math.cos(rpy[2]), Math.sin(rpy[2])];
  return [[cy * cp, cy * sp * sr - sy * cr, cy * sp * cr + sy * sr],
          [sy * cp, sy * sp * sr + cy * cr, sy * sp * cr - cy * sr],
          [-sp, cp * sr, cp * cr]];
}
const rot = (R, v) => [0, 1, 2].map(i => R[i][0] * v[0] + R[i][1] * v[1] + R[i][2] * v[2]);
const cross = (a, b) => [a[1] * b[2] - a[2] * b[1], a[2] * b[0] - a[0] * b[2], a[0] * b[1] - a[1] * b[0]];
// A body's outline in the world frame, made once: box corners and edges, a cylinder's end rings (polylines),
// and for a sphere or capsule its round part (centres and radius), whose outline depends on where the viewer
// stands and is made per frame. `grow` (m) widens a round body by that much: a zone around a sphere or capsule
// is the same shape with a larger radius, as the distances the filter measures are from the body's surface.
function bodyGeometry(b, grow) {
  const R = rpyMatrix(b.rpy), c = b.xyz, out = {name: b.name, shape: b.shape, lines: []};
  const at = v => add(c, rot(R, v), 1);
  if (b.shape === "box") {
    const h = b.size.map(v => v / 2);
    out.corners = [0, 1, 2, 3, 4, 5, 6, 7].map(i => at([i & 1 ? h[0] : -h[0], i & 2 ? h[1] : -h[1], i & 4 ? h[2] : -h[2]]));
    [[0,1],[2,3],[4,5],[6,7],[0,2],[1,3],[4,6],[5,7],[0,4],[1,5],[2,6],[3,7]].forEach(e => out.lines.push([out.corners[e[0]], out.corners[e[1]]]));
  } else if (b.shape === "sphere") {
    out.round = {centres: [c], r: b.size[0] + grow};
  } else {  // cylinder or capsule: radius, length along the body's z
    const r = b.size[0] + grow, half = b.size[1] / 2;
    out.ends = [at([0, 0, -half]), at([0, 0, half])];
    if (b.shape === "capsule") out.round = {centres: out.ends, r};
    else {
      out.sides = {r, dir: column(R, 2)};
      out.ends.forEach(e => out.lines.push(Array.from({length: 33}, (_, k) => {  // end rings, closed
        const a = 2 * Math.PI * k / 32;
        return add(add(e, column(R, 0), r * Math.cos(a)), column(R, 1), r * Math.sin(a));
      })));
    }
  }
  return out;
}
function polyline(cam, pts, colour, width, dash) {
  ctx.strokeStyle = colour; ctx.lineWidth = width; ctx.setLineDash(dash || []); ctx.beginPath();
  pts.forEach((p, i) => { const q = cam.project(p); i ? ctx.lineTo(q[0], q[1]) : ctx.moveTo(q[0], q[1]); });
  ctx.stroke(); ctx.setLineDash([]);
}
// A ball projects (nearly) to a circle: its centre, and its radius along the view's up axis, in pixels.
function screenBall(cam, c, r) {
  const p = cam.project(c), e = cam.project(add(c, cam.up, r));
  return [p[0], p[1], Math.hypot(e[0] - p[0], e[1] - p[1])];
}
// Silhouette of a sphere (one ball) or a capsule (two balls swept along a segment): the two end circles joined
// by their outer tangents, each circle drawn only on its far side, so a zone is one closed curve with no
// arcs crossing its inside (a dozen overlapping zone outlines must stay readable over the arm).
function roundPath(cam, round) {
  const P = round.centres.map(c => screenBall(cam, c, round.r));
  ctx.beginPath();
  const d = P.length > 1 ? Math.hypot(P[1][0] - P[0][0], P[1][1] - P[0][1]) : 0;
  if (P.length === 1 || d <= Math.abs(P[1][2] - P[0][2]) + 1e-6) {  // seen end on: one circle holds the other
    const [x, y, r] = P.reduce((a, b) => (b[2] > a[2] ? b : a));
    ctx.arc(x, y, r, 0, 2 * Math.PI);
    return;
  }
  const [[x1, y1, r1], [x2, y2, r2]] = P, th = Math.atan2(y2 - y1, x2 - x1), phi = Math.acos((r1 - r2) / d);
  ctx.arc(x1, y1, r1, th + phi, th - phi + 2 * Math.PI);  // the side of end 1 away from end 2
  ctx.arc(x2, y2, r2, th - phi, th + phi);  // and end 2's; the joins are the tangent lines
  ctx.closePath();
}
function drawBody(cam, g, colour, width, dash, fill) {
  g.lines.forEach(pts => polyline(cam, pts, colour, width, dash));
  if (g.round) {
    roundPath(cam, g.round);
    if (fill) { ctx.fillStyle = fill; ctx.fill(); }
    ctx.strokeStyle = colour; ctx.lineWidth = width; ctx.setLineDash(dash || []); ctx.stroke(); ctx.setLineDash([]);
  }
  if (g.sides) {  // a cylinder's side lines: where its surface turns away from the viewer
    const n = cross(g.sides.dir, cam.back), len = Math.hypot(...n);
    if (len > 1e-6) [1, -1].forEach(sgn => {
      const u = n.map(v => sgn * g.sides.r * v / len);
      line(cam, add(g.ends[0], u, 1), add(g.ends[1], u, 1), colour, width, dash);
    });
  }
}
// Geometry is made once, when the scene arrives (the bodies do not move during a test drive).
function sceneBodies(world) {
  if (!world) return null;
  return {
    furniture: world.furniture.map(b => bodyGeometry(b, 0)),
    person: world.person.map(b => bodyGeometry(b, 0)),
    keepOut: world.person.map(b => bodyGeometry(b, world.keep_out)),
    zone: world.person.map(b => bodyGeometry(b, world.reduced_zone)),
  };
}
function drawBodies(cam) {
  const B = S.bodies;
  if (!B) { view.dataset.bodies = "0"; view.dataset.zones = "0"; return; }
  // zones first and lightest, so the bodies' own outlines stay on top of them
  B.zone.forEach(g => drawBody(cam, g, ZONE_COLOUR, 1, [6, 5]));
  B.keepOut.forEach(g => drawBody(cam, g, KEEP_OUT_COLOUR, 1, [2, 4]));
  B.furniture.forEach(g => drawBody(cam, g, FURNITURE_COLOUR, 2));
  B.person.forEach(g => drawBody(cam, g, PERSON_COLOUR, 2.5, null, PERSON_FILL));  // a light fill: a body, not a zone
  // what was drawn, for the browser test: one outline per body, two zone outlines per person body
  view.dataset.bodies = String(B.furniture.length + B.person.length);
  view.dataset.zones = String(B.keepOut.length + B.zone.length);
}
function drawScene() {
  const sc = S.scene, st = S.state;
  ctx.fillStyle = "#fff"; ctx.fillRect(0, 0, view.width, view.height);
  if (!sc || !st) return;
  const cam = camera();
  for (let i = -5; i <= 5; i++) {  // floor grid, 10 cm
    line(cam, [i / 10, -0.5, 0], [i / 10, 0.5, 0], "#e4e4e4", 1);
    line(cam, [-0.5, i / 10, 0], [0.5, i / 10, 0], "#e4e4e4", 1);
  }
  const lo = sc.workspace_min, hi = sc.workspace_max;
  if (lo.concat(hi).every(isFinite)) {  // workspace box
    const c = [0, 1, 2, 3, 4, 5, 6, 7].map(i => [i & 1 ? hi[0] : lo[0], i & 2 ? hi[1] : lo[1], i & 4 ? hi[2] : lo[2]]);
    [[0,1],[2,3],[4,5],[6,7],[0,2],[1,3],[4,6],[5,7],[0,4],[1,5],[2,6],[3,7]].forEach(e => line(cam, c[e[0]], c[e[1]], "#bbb", 1, [4, 4]));
  }
  drawBodies(cam);  // under the goals and the arm, which must stay readable where a body is behind them
  sc.goal_targets.forEach((t, g) => {  // goals: approach pose (point + orientation) and the fine motion
    const colour = GOAL_COLOURS[g % GOAL_COLOURS.length];
    line(cam, t[0], t[1], colour, 2, [3, 3]);
    triad(cam, t[0], sc.goal_rot[g], 0.04, 1.5);
    dot(cam, t[0], 9, colour, st.phase[g] === 2);
    dot(cam, t[1], 4, colour, true);
    if (g === st.target) dot(cam, t[0], 14, colour, false);
    const p = cam.project(t[0]);
    ctx.fillStyle = colour; ctx.font = "13px sans-serif"; ctx.fillText(sc.goal_names[g], p[0] + 12, p[1] - 8);
  });
  ctx.strokeStyle = "#f80"; ctx.lineWidth = 2; ctx.beginPath();  // tool path
  st.path.forEach((p, i) => { const q = cam.project(p); i ? ctx.lineTo(q[0], q[1]) : ctx.moveTo(q[0], q[1]); });
  ctx.stroke();
  let prev = [0, 0, 0];  // arm: links as thick segments between link frames, joints as discs, frame triads
  dot(cam, prev, 12, "#555", true);
  st.links.forEach(([p, R], i) => {
    line(cam, prev, p, "#4a5a70", 9);
    dot(cam, p, 5, "#223", true);
    triad(cam, p, R, i === st.links.length - 1 ? 0.06 : 0.03, 2);
    prev = p;
  });
}

let drag = null;
view.addEventListener("mousedown", e => { drag = [e.clientX, e.clientY]; });
addEventListener("mouseup", () => { drag = null; });
addEventListener("mousemove", e => {
  if (!drag) return;
  S.yaw -= (e.clientX - drag[0]) * 0.01;
  S.pitch = Math.max(-1.4, Math.min(1.4, S.pitch + (e.clientY - drag[1]) * 0.01));
  drag = [e.clientX, e.clientY];
});
view.addEventListener("wheel", e => { e.preventDefault(); S.zoom *= Math.exp(-e.deltaY * 0.001); }, {passive: false});
function fit() { view.width = view.clientWidth; view.height = view.clientHeight; }
addEventListener("resize", fit);
