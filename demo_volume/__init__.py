"""The invented demo session: a generator of raw volumes, a rig log and their planted truth.

``demo_volume.generate.generate(out_dir, preset=..., seed=..., layout=...)`` writes one
session and ``demo_volume.generate.verify(out_dir)`` checks a cached copy; see README.md.
The generator module is not imported here, so ``python -m demo_volume.generate`` runs cleanly.
"""

from demo_volume._params import Scenario, load_scenario, preset_names

__all__ = ["load_scenario", "preset_names", "Scenario"]
