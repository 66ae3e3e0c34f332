"""The invented demo scenario.

In: ``configs/demo_scenario.toml`` and ``configs/demo_optics.toml`` (an
invented specimen, labels and instrument). Out: the simulated stacks in
``demo_stacks/`` (:mod:`.scenario`) and, from them, a whole run of the tool
with its report (:mod:`.runner`).
"""

from .runner import run_demo
from .scenario import Scenario, demo_inputs, demo_stacks_dir, generate, load_scenario, simulate

__all__ = ["Scenario", "demo_inputs", "demo_stacks_dir", "generate", "load_scenario", "run_demo", "simulate"]
