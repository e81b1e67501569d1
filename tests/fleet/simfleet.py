"""A simulated fleet: vehicles x nights from one scenario template, with known faults.

Each night's scenario names its vehicle in ``[run] meta``, so the log's ``%meta`` carries
``vehicle`` as a fleet's loggers would write it.
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

from tracelab.simulate import load_scenario, simulate

CATALOG = """
[bus.P]
nominal = 500000
name = "powertrain"

[node.vcu]
buses = ["P"]
[node.inv]
buses = ["P"]
[node.bms]
buses = ["P"]
[node.tms]
buses = ["P"]

[[message]]
bus = "P"
id = "0C0"
form = "s"
dlc = 8
sender = "vcu"
period = "10ms"
name = "drive_command"

[[message]]
bus = "P"
id = "120"
form = "s"
dlc = 8
sender = "inv"
period = "10ms"
name = "inverter_state"

[[message]]
bus = "P"
id = "2A0"
form = "s"
dlc = 8
sender = "bms"
period = "20ms"
name = "battery_state"

[[message]]
bus = "P"
id = "3F0"
form = "s"
dlc = 4
sender = "tms"
period = "50ms"
name = "coolant_state"
"""


@dataclass(frozen=True)
class Night:
    vehicle: str
    night: int
    faults: str = ""  # extra [[fault]] tables
    seconds: float = 3.0
    suffix: str = ".frames.gz"

    @property
    def run(self) -> str:
        return f"{self.vehicle}-{self.night:02d}"

    @property
    def origin(self) -> str:
        return f"2026-11-{self.night:02d}T21:00:00Z"


TX_NOISE = """
[[fault]]
node = "{node}"
kind = "tx-noise"
start = "0.5s"
rate = 0.6
"""
SILENT = """
[[fault]]
node = "bms"
kind = "silent"
start = "0.6s"
end = "1.4s"
"""
DRIFT = """
[[fault]]
node = "inv"
kind = "drift"
ppm = 4000
"""


def write_night(root: Path, night: Night) -> Path:
    """Simulate one night; returns the log (its truth file lies beside it)."""
    folder = root / night.vehicle / night.origin[:10]
    folder.mkdir(parents=True, exist_ok=True)
    scenario = folder / f"{night.run}.toml"
    scenario.write_text(f'[run]\nname = "{night.run}"\nduration = "{night.seconds}s"\n'
                        f'seed = {night.night}\norigin = "{night.origin}"\n'
                        f'status_every = "100ms"\nmeta = {{ vehicle = "{night.vehicle}" }}\n'
                        # the replay still takes an error record's time as the flag start
                        + '[logger]\nview = "detector"\n'
                        + CATALOG + night.faults)
    log = folder / f"{night.run}{night.suffix}"
    simulate(load_scenario(scenario), log, quiet=True)  # compression by the extension
    scenario.unlink()
    return log


def write_catalogs(root: Path, vehicles: list[str]) -> None:
    for vehicle in vehicles:
        (root / vehicle).mkdir(parents=True, exist_ok=True)
        (root / vehicle / "catalog.toml").write_text(CATALOG)



