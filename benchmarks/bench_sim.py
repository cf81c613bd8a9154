"""Cost of the simulated rig, measured side by side in one run.

Run ``python benchmarks/bench_sim.py``. It prints:

1. the cost of a set-point change (``apply``: rebuilds the cached detuning stencil);
2. the cost of one acquisition of 1000 shots right after a set-point change;
3. the cost of the vectorised model for one set-point (9 velocity classes x photon numbers
   1..4) against the same pipeline with qutip's ``sesolve`` called once per velocity class and
   photon number, the ratio of the two, and their agreement in amplitude and in probability;
4. the error of the stencil interpolation that acquisitions use under drift, and the cost of
   the truth's best-set-point search (first call and cached call);
5. the cost of the model for one set-point with each mode profile, as a ratio to the Gaussian's
   (the other profiles integrate the crossing in two passes of half the steps each).

Targets (task brief): acquisition well under 1 ms, set-point change a few tens of ms at most,
model >= 100x faster than qutip at 1e-6 agreement.
"""

from __future__ import annotations

import contextlib
import dataclasses
import logging
import statistics
import sys
import time
from pathlib import Path

import numpy as np
import structlog

REPO = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(REPO))

from drivers_sim import physics  # noqa: E402
from drivers_sim.config import load_sim_config  # noqa: E402
from drivers_sim.rig import SimulatedRig  # noqa: E402

CONFIG = REPO / "configs" / "sim-rig.toml"
SEED = 7


def _median_time(function, repeats):
    times = []
    for _ in range(repeats):
        start = time.perf_counter()
        function()
        times.append(time.perf_counter() - start)
    return statistics.median(times)


def qutip_crossing(velocity, detuning_hz, photons, *, coupling_hz, waist_m, half_width=6.0):
    """One crossing by qutip's sesolve on atom x Fock space (same frame as the model)."""
    import qutip

    n = int(photons)
    if n == 0:
        return 1.0 + 0j, 0j
    size = n + 2
    ket_e, ket_g = qutip.basis(2, 0), qutip.basis(2, 1)
    a = qutip.tensor(qutip.qeye(2), qutip.destroy(size))
    raise_atom = qutip.tensor(ket_e * ket_g.dag(), qutip.qeye(size))
    project_e = qutip.tensor(ket_e.proj(), qutip.qeye(size))
    project_g = qutip.tensor(ket_g.proj(), qutip.qeye(size))
    delta = 2.0 * np.pi * detuning_hz
    transit = waist_m / velocity
    hamiltonian = [
        0.5 * delta * (project_e - project_g),
        [np.pi * coupling_hz * (raise_atom * a + a.dag() * raise_atom.dag()),
         lambda t: np.exp(-((t / transit) ** 2))],
    ]
    start = qutip.tensor(ket_g, qutip.basis(size, n))
    t0, t1 = -half_width * transit, half_width * transit
    result = qutip.sesolve(hamiltonian, start, [t0, t1],
                           options={"atol": 1e-10, "rtol": 1e-8, "nsteps": 10**7,
                                    "max_step": transit / 20.0})
    final = result.states[-1]
    a_g = start.overlap(final) * np.exp(-0.5j * delta * (t1 - t0))
    a_e = qutip.tensor(ket_e, qutip.basis(size, n - 1)).overlap(final)
    return complex(a_g), complex(a_e)


def _qutip_crossing_amplitudes(velocity, detuning_hz, photons, *, coupling_hz, waist_m, **_):
    """Drop-in for physics.crossing_amplitudes: one sesolve per (velocity class, photon number)."""
    velocity, detuning_hz, photons = np.broadcast_arrays(velocity, detuning_hz, photons)
    a_g = np.empty(velocity.shape, complex)
    a_e = np.empty(velocity.shape, complex)
    for index in np.ndindex(velocity.shape):
        a_g[index], a_e[index] = qutip_crossing(velocity[index], detuning_hz[index], photons[index],
                                                coupling_hz=coupling_hz, waist_m=waist_m)
    return a_g, a_e


@contextlib.contextmanager
def _crossings_by_qutip():
    original = physics.crossing_amplitudes
    physics.crossing_amplitudes = _qutip_crossing_amplitudes
    try:
        yield
    finally:
        physics.crossing_amplitudes = original


def main() -> int:
    structlog.configure(wrapper_class=structlog.make_filtering_bound_logger(logging.WARNING))
    config = load_sim_config(CONFIG)
    rig = SimulatedRig(config, SEED)

    # 1-2. Set-point change, then one acquisition of 1000 shots right after it.
    velocities = [505.0, 515.0]
    apply_times, acquire_times = [], []
    for k in range(40):
        start = time.perf_counter()
        rig.apply({"velocity": velocities[k % 2], "detuning": 1e3 * (k % 3)})
        apply_times.append(time.perf_counter() - start)
        start = time.perf_counter()
        rig.acquire("one_photon", 0.1 * k, 1000)
        acquire_times.append(time.perf_counter() - start)
    apply_s = statistics.median(apply_times)
    acquire_s = statistics.median(acquire_times)
    print(f"set-point change (apply)                : {apply_s * 1e3:8.3f} ms  (median of 40)")
    print(f"acquire 1000 shots after the change     : {acquire_s * 1e3:8.3f} ms  (median of 40)")

    # 3. Model vs qutip for one set-point, same distribution (nodes x photon numbers).
    model = rig._model
    velocity_set, detuning = 509.7, 2.5e3
    model_s = _median_time(lambda: physics.outcome_coefficients(model, velocity_set, detuning), 20)
    ours = physics.outcome_coefficients(model, velocity_set, detuning)
    v_true, _ = physics.velocity_nodes(velocity_set + model.velocity_bias_m_per_s,
                                       model.velocity_spread_m_per_s, model.velocity_nodes)
    photons = np.arange(1, model.max_photons + 1)
    mode = {"coupling_hz": model.coupling_hz, "waist_m": model.waist_m}
    ours_g, ours_e = physics.crossing_amplitudes(v_true[:, None], detuning, photons[None, :], **mode)
    start = time.perf_counter()
    with _crossings_by_qutip():
        reference = physics.outcome_coefficients(model, velocity_set, detuning)
    qutip_s = time.perf_counter() - start
    ref_g, ref_e = _qutip_crossing_amplitudes(v_true[:, None], detuning, photons[None, :], **mode)
    amplitude_error = max(np.abs(ours_g - ref_g).max(), np.abs(ours_e - ref_e).max())
    probability_error = np.abs(ours - reference).max()
    calls = v_true.size * photons.size
    print(f"model, one set-point ({model.velocity_nodes} classes x n=1..{model.max_photons}) : "
          f"{model_s * 1e3:8.3f} ms")
    print(f"qutip sesolve x {calls} for the same          : {qutip_s * 1e3:8.1f} ms")
    print(f"ratio qutip / model                     : {qutip_s / model_s:8.0f} x   (target >= 100)")
    print(f"agreement: amplitude {amplitude_error:.2e}, fringe coefficients {probability_error:.2e}"
          "   (target 1e-6)")

    # 4. Stencil interpolation error under drift, and the truth search.
    rng = np.random.default_rng(SEED)
    worst = 0.0
    for _ in range(50):
        rig.advance(float(rng.uniform(0.0, 120.0)))
        cached = rig._coefficients_now()
        true_detuning = rig._true_detuning_hz(rig.status()["setpoints"]["detuning"])
        direct = rig._detected(rig.status()["setpoints"]["velocity"], true_detuning)
        worst = max(worst, float(np.abs(cached - direct).max()))
    print(f"stencil interpolation error (50 drifts) : {worst:.2e} in probability")
    fresh = SimulatedRig(config, SEED)
    start = time.perf_counter()
    fresh.truth()
    first_s = time.perf_counter() - start
    cached_s = _median_time(fresh.truth, 10)
    print(f"truth: first call (best search)         : {first_s * 1e3:8.1f} ms; cached: {cached_s * 1e3:.2f} ms")

    # 5. One set-point of the model per mode profile, side by side.
    profiles = [physics.ModeProfile(), physics.ModeProfile("super_gaussian", order=4.0),
                physics.ModeProfile("asymmetric", asymmetry=0.3)]
    costs = []
    for profile in profiles:
        shaped = dataclasses.replace(model, mode_profile=profile)
        costs.append(_median_time(
            lambda shaped=shaped: physics.outcome_coefficients(shaped, velocity_set, detuning), 20))
    print("model, one set-point, per mode profile  : " + ", ".join(
        f"{p.kind} {c * 1e3:.3f} ms ({c / costs[0]:.2f}x)" for p, c in zip(profiles, costs)))
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
