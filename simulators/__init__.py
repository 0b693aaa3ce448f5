"""Field simulators: invented sites whose traffic exercises watchdog-edge, and threshold tuning.

>>> from simulators import load_scenario, simulate
>>> run = simulate(load_scenario("cold-store"), seed=3, duration_h=0.5)
>>> run.messages[0].topic
'northquay/rack/power/predicted'
"""

from .generate import Message, Run, simulate, train
from .scenario import Scenario, load_scenario, scenario_names

__all__ = ["Message", "Run", "Scenario", "load_scenario", "scenario_names", "simulate", "train"]
