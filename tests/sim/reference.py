"""Helpers of the simulated-rig tests: scenario perturbation and a qutip reference solver."""

from __future__ import annotations

from pathlib import Path

import numpy as np

from drivers_sim.config import SimRigConfig, sim_config_from_dict

REPO = Path(__file__).resolve().parents[2]
DEMO_CONFIG = REPO / "configs" / "sim-rig.toml"
SEED = 20240611

# Demo values of docs/physics.md section 6 (design values of the invented "Bench 2").
COUPLING_HZ = 49e3
WAIST_M = 5.8e-3


def perturbed(config: SimRigConfig, **sections: dict) -> SimRigConfig:
    """A checked copy of ``config`` with some keys of some sections replaced."""
    data = config.to_dict()
    for section, values in sections.items():
        data[section].update(values)
    return sim_config_from_dict(data, source=f"<{config.source} perturbed>")



def qutip_crossing(velocity, detuning_hz, photons, *, coupling_hz=COUPLING_HZ, waist_m=WAIST_M,
                   half_width=6.0, envelope=None, window=None):
    """Crossing amplitudes from qutip's sesolve on the full Jaynes-Cummings Hamiltonian.

    Atom (e, g) times a Fock space of ``photons + 2`` levels, H = (delta/2)(|e><e| - |g><g|)
    + (Omega(t)/2)(|e><g| a + a^dag |g><e|), Omega(t) = Omega_0 f(v t/w) with f(x) = exp(-x^2)
    unless ``envelope`` (a scalar function of x) is given, over ``window`` = (x_start, x_end)
    in waists (default +-half_width, wider than the model's window, so truncation is tested too).
    Returns a_g relative to the free evolution of |g,n> and a_e in the interaction picture, both
    with the time origin at the mode centre (x = 0).
    """
    import qutip

    n = int(photons)
    size = n + 2
    ket_e, ket_g = qutip.basis(2, 0), qutip.basis(2, 1)
    a = qutip.tensor(qutip.qeye(2), qutip.destroy(size))
    raise_atom = qutip.tensor(ket_e * ket_g.dag(), qutip.qeye(size))
    project_e = qutip.tensor(ket_e.proj(), qutip.qeye(size))
    project_g = qutip.tensor(ket_g.proj(), qutip.qeye(size))
    delta = 2.0 * np.pi * detuning_hz
    omega = 2.0 * np.pi * coupling_hz
    transit = waist_m / velocity
    if envelope is None:
        def envelope(x):
            return np.exp(-(x**2))
    hamiltonian = [
        0.5 * delta * (project_e - project_g),
        [0.5 * omega * (raise_atom * a + a.dag() * raise_atom.dag()),
         lambda t: envelope(t / transit)],
    ]
    start = qutip.tensor(ket_g, qutip.basis(size, n))
    x0, x1 = window if window is not None else (-half_width, half_width)
    t0, t1 = x0 * transit, x1 * transit
    result = qutip.sesolve(hamiltonian, start, [t0, t1],
                           options={"atol": 1e-13, "rtol": 1e-11, "nsteps": 10**7,
                                    "max_step": transit / 20.0})
    final = result.states[-1]
    # Interaction picture of H0 = (delta/2)(|e><e| - |g><g|) with its origin at t = 0:
    # |g> is rotated back by exp(-i delta (t1 - t0) / 2), |e> by exp(+i delta (t0 + t1) / 2).
    a_g = start.overlap(final) * np.exp(-0.5j * delta * (t1 - t0))
    a_e = qutip.tensor(ket_e, qutip.basis(size, n - 1)).overlap(final) * np.exp(
        0.5j * delta * (t0 + t1)) if n > 0 else 0.0
    return complex(a_g), complex(a_e)
