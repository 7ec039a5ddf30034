"""Regenerate the bench logs of the invented cart-pole rig (see README.md beside this file).

    .venv/bin/python configs/bench/make_logs.py

The rig is simulated with pretrial's own cart-pole physics (RK4, 8 substeps per 20 ms period, finer
than the calibration's default), the pole hanging down, the cart driven by the excitation below
and held near the middle of the track by the bench's centring loop (clipped at 8 N);
the logger records positions only, with encoder noise, and the applied force in N.
"""

from __future__ import annotations

import csv
import math
from pathlib import Path

import numpy as np

import pretrial_envs

HERE = Path(__file__).resolve().parent
#: the invented rig (what calibration should find)
RIG = {"cart_mass": 1.2, "pole_mass": 0.15, "pole_half_length": 0.4, "cart_friction": 0.02,
       "pole_friction": 5e-4, "gravity": 9.81}
DT = 0.02  # s, the logger's period
SECONDS = 10.0
#: encoder noise (1 sigma): 0.5 mm on the cart, 1 mrad on the pole
NOISE = {"x": 5e-4, "theta": 1e-3}
#: viscous drag of the cart's belt drive, N s/m: an effect pretrial's cart-pole does not model (its track
#: friction is Coulomb only), so calibration cannot absorb it and a residual has something to learn
BELT_DRAG = 0.6


#: the bench's cart-centring loop (a PD on the measured cart position): keeps the cart on a short track
CENTRE_KP = 8.0  # N/m
CENTRE_KD = 4.0  # N s/m


def excitation(t: np.ndarray, run: int, rng: np.random.Generator) -> np.ndarray:
    """Open-loop part of the force in N: a multisine over 0.3-3 Hz with random phases (around the
    pendulum's 0.9 Hz swing), plus a slow +-1.5 N square wave that walks the cart to and fro."""
    freqs = np.linspace(0.3, 3.0, 10)
    phases = rng.uniform(0.0, 2.0 * math.pi, freqs.size)
    multi = np.sin(2.0 * math.pi * freqs[:, None] * t[None, :] + phases[:, None]).sum(axis=0)
    multi *= 4.0 / np.abs(multi).max()
    return multi + 1.5 * np.sign(np.sin(2.0 * math.pi * t / (6.0 + run)))


def rig_step(physics, state: np.ndarray, force: float, params: np.ndarray) -> np.ndarray:
    """One period of the rig: the cart-pole with the belt's drag -BELT_DRAG x_dot acting on the cart beside
    the motor's force (a horizontal force on the cart enters the equations as the applied force does)."""
    h = physics.dt / physics.substeps
    u = np.array([[force]])

    def f(x, _u, p):
        return physics.derivatives(x, u - BELT_DRAG * x[:, 1:2], p)

    for _ in range(physics.substeps):
        state = pretrial_envs.rk4_step(f, state, u, params, h)
    return state[0]


def simulate(run: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    physics = pretrial_envs.make_physics("pretrial/CartPole-v0", dt=DT, substeps=8, integrator="rk4")
    params = physics.param_table.resolve(RIG)[None, :]
    rng = np.random.default_rng(100 + run)
    t = np.arange(int(SECONDS / DT)) * DT
    drive = excitation(t, run, rng)
    force = np.zeros(t.size)
    x = np.zeros((t.size, 4))
    x[0] = [0.0, 0.0, math.pi + rng.normal(0.0, 0.05), 0.0]  # hanging, a little off plumb
    for k in range(t.size - 1):  # one rig, one step at a time: this is the rig, not the estimator
        force[k] = np.clip(drive[k] - CENTRE_KP * x[k, 0] - CENTRE_KD * x[k, 1], -8.0, 8.0)
        x[k + 1] = rig_step(physics, x[k : k + 1], force[k], params)
    force[-1] = force[-2]
    return t, x, force


def main() -> None:
    for run in range(1, 4):
        t, x, force = simulate(run)
        rng = np.random.default_rng(200 + run)
        cart = x[:, 0] + rng.normal(0.0, NOISE["x"], t.size)
        pole = x[:, 2] + rng.normal(0.0, NOISE["theta"], t.size)
        path = HERE / f"run{run}.csv"
        with open(path, "w", newline="") as f:
            w = csv.writer(f)
            w.writerow(["t", "x", "theta", "force"])
            for row in zip(t, cart, pole, force):
                w.writerow([f"{row[0]:.3f}", f"{row[1]:.6f}", f"{row[2]:.6f}", f"{row[3]:.4f}"])
        print(path)


if __name__ == "__main__":
    main()
