"""Trundle: kinematic analysis and fixed-step simulation of wheeled mobile robot bases.

The core (robot model, wheel constraints, kinematics, analysis, engine) is
pure numpy.  Typical use::

    from sim import load_robot, Simulator
    robot = load_robot("scenarios/robots/ward-cart.yaml")
    sim = Simulator(robot, step=0.01)
    row = sim.step(twist=(0.5, 0.0, 0.2))     # body twist: m/s, m/s, rad/s
    row.pose, row.twist, row.slip             # world pose, body twist, m/s
"""
__version__ = "0.1.0"

# The names below load their module on first use, so that a command which does
# not need numpy (``trundle batch`` handing work to its processes) starts fast.
_API = {
    "analyze": "theory.analysis", "Simulator": "engine.simulator", "StepResult": "engine.simulator",
    "InputError": "errors", "forward": "theory.kinematics", "inverse": "theory.kinematics",
    "Robot": "model.robot", "Wheel": "model.robot", "load_robot": "files.robotfile",
    "RunResult": "runs.runner", "run_scenario": "runs.runner",
    "Scenario": "files.scenario", "load_scenario": "files.scenario",
    "Floor": "model.floor", "load_floor": "files.floorfile",
    "clearance_along": "runs.clearance", "ClearanceMeter": "runs.clearance",
}
__all__ = [*_API, "__version__"]


def __getattr__(name):
    if name not in _API:
        raise AttributeError(f"module 'sim' has no attribute {name!r}")
    import importlib
    value = getattr(importlib.import_module(f"sim.{_API[name]}"), name)
    globals()[name] = value
    return value


def __dir__():
    return sorted(set(globals()) | set(_API))
