"""Simulated arm-and-camera cell (no ROS): drives, renderer, scenarios, ground truth.

Entry points: ``load_scenario(name_or_path)`` and ``SimCell(scenario)``.
"""
from vservo_node.sim.cell import SimCell
from vservo_node.sim.scenario import Scenario, ScenarioError, load_scenario

__all__ = ["SimCell", "Scenario", "ScenarioError", "load_scenario"]
