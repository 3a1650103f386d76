"""Write observations.csv for the bring-your-own-physics example.

Run from anywhere:  python scripts/own_physics_example/make_observations.py
It plays the part of the lab: it simulates the real circuit and keeps only the
measured columns (v, i), with 1 % measurement noise.
"""

from pathlib import Path

from circuit_physics import CircuitWithHeatingResistor

from mnemode.data import generate
from mnemode.solvers import RK4
from mnemode.systems import System

HERE = Path(__file__).resolve().parent


def main(out: Path = HERE / "observations.csv") -> Path:
    rig = CircuitWithHeatingResistor()
    lab = System(name="circuit_lab", state_names=("v", "i"), state_units=("V (scaled)", "A (scaled)"),
                 time_unit="s (scaled)", nominal=rig.nominal, truth=rig, observed_index=(0, 1),
                 hidden_names=("resistor_temperature_rise",), spin_up=30.0,
                 initial_mean=(0.0, 0.0, 0.5), initial_scale=(2.0, 2.0, 0.2))
    data = generate(lab, n_trajectories=8, duration=40.0, dt=0.05, solver=RK4(0.01), seed=3, noise=0.01)
    data.hidden = None  # the lab cannot measure the resistor temperature
    return data.save(out)


if __name__ == "__main__":
    print(f"wrote {main()}")
