"""The physics simulator behind the demo ride, every fixture and the end-to-end tests.

``simulate(rig, scenario)`` turns a ride :class:`Scenario` into a :class:`SimRide`: tooth edge
times of the rig's trigger wheel, ECU status, accelerometer samples and the ground truth of every
firing event; ``write_ride`` lays it out as the rig's CAN frames (any python-can log format),
serial capture files, a truth CSV and a copy of the scenario.
"""

from crankbeat.logger.sim.canframes import CanFrames, build_frames
from crankbeat.logger.sim.ride import TRUTH_DTYPE, AccelTruth, SimRide, simulate
from crankbeat.logger.sim.scenario import (
    CanSpec,
    EngineSpec,
    Fault,
    Physics,
    Scenario,
    Segment,
    SerialSpec,
    WheelSpec,
    load_scenario,
    scenario_from_dict,
    scenario_to_toml,
)
from crankbeat.logger.sim.writers import (
    CAN_FORMATS,
    RidePaths,
    can_messages,
    read_truth,
    serial_chunks,
    write_can,
    write_ride,
    write_truth,
)

__all__ = [
    "CAN_FORMATS", "CanFrames", "RidePaths", "build_frames", "can_messages", "read_truth",
    "serial_chunks", "write_can", "write_ride", "write_truth",
    "TRUTH_DTYPE", "AccelTruth", "CanSpec", "EngineSpec", "Fault", "Physics", "Scenario",
    "Segment", "SerialSpec", "SimRide", "WheelSpec", "load_scenario", "scenario_from_dict",
    "scenario_to_toml", "simulate",
]
