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

from .analysis import analyze  # noqa: E402
from .engine import Simulator, StepResult  # noqa: E402
from .errors import InputError  # noqa: E402
from .kinematics import forward, inverse  # noqa: E402
from .robot import Robot, Wheel, load_robot  # noqa: E402
from .runner import RunResult, run_scenario  # noqa: E402
from .scenario import Scenario, load_scenario  # noqa: E402

__all__ = ["analyze", "Simulator", "StepResult", "InputError", "forward", "inverse",
           "Robot", "Wheel", "load_robot", "RunResult", "run_scenario", "Scenario",
           "load_scenario", "__version__"]
