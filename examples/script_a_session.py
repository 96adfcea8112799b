"""Script the synthetic session from Python instead of the command line.

Renders the quick `waves` session in memory, keeps the first wave frame pair,
and prints the exact surface height at the field centre over time. Run:  python examples/script_a_session.py
"""

import numpy as np

from surfrec.synth import build_scenario, render_session

scenario = build_scenario("waves", quick=True, seed=1)
frames = {}


def keep(group, index, left, right):
    if group == "waves" and index == 0:
        frames["first"] = (left, right)


render_session(scenario, keep, workers=2)
left, right = frames["first"]
print(f"first wave frame pair: {left.shape[1]}x{left.shape[0]} px, {left.dtype}, "
      f"mean grey {left.mean():.1f} / {right.mean():.1f}")

waves = scenario.group("waves")
for t in waves.times:
    h = waves.surface.height(0.0, 0.0, float(t))
    print(f"t = {t * 1e3:5.1f} ms   h(0, 0) = {h:+.4f} mm")
