"""simulate layer: scenario loading and the discrete-event bus simulator (docs/simulator.md)."""

from tracelab.simulate.scenario import Scenario, load_scenario
from tracelab.simulate.simulator import SimulationSummary, simulate, truth_path

__all__ = ["Scenario", "SimulationSummary", "load_scenario", "simulate", "truth_path"]
