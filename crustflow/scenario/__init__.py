"""Scenario files: TOML to frozen, typed dataclasses in SI units. Opens no grids."""

from crustflow.scenario.document import Scenario, load_scenario, scenario_from_dict
from crustflow.scenario.parameters import ModelParameters

__all__ = ["ModelParameters", "Scenario", "load_scenario", "scenario_from_dict"]
