"""Per-event combustion parameters: what each firing event of each cylinder really does.

Decisions (fuel cut, misfire, partial burn, retard) are taken once per event, in the ride's first
pass, from the event's estimated time and crank speed, and then frozen: later passes only refine
the dynamics, never the ground truth.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from crankbeat.dsp.engine import Engine
from crankbeat.logger.sim import combustion, maps
from crankbeat.logger.sim.scenario import Fault, Scenario

GRID_STEP_DEG = 1.0
N_GRID = int(round(720 / GRID_STEP_DEG))


@dataclass
class EventParams:
    """Arrays of shape (n_cycles + 2, n_cyl): row 0 is cycle -1, the last row cycle n_cycles."""

    p_man: np.ndarray  # Pa
    p_ivc: np.ndarray  # Pa
    heat: np.ndarray  # J released into the gas
    start: np.ndarray  # Wiebe start, degrees from firing TDC
    duration: np.ndarray  # degrees
    burn_fraction: np.ndarray  # 1 normal, 0 misfire or fuel cut
    retard: np.ndarray  # degrees
    fuel_cut: np.ndarray  # bool
    rough: np.ndarray  # bool: the event falls in a rough-road segment
    rpm: np.ndarray  # rpm estimate when the decision was taken
    throttle: np.ndarray  # %


def fault_effects(
    faults: tuple[Fault, ...], cylinder: int, cycle: int, t: float, u: float
) -> tuple[float, float]:
    """(burn fraction, retard degrees) of one event from the scenario's faults.

    ``u`` is the event's pre-drawn uniform number, so that a probability is decided the same way
    in every pass.
    """
    burn, retard = 1.0, 0.0
    for f in faults:
        if f.cylinder != cylinder:
            continue
        if f.cycles is not None:
            hit = cycle in f.cycles
        else:
            hit = f.start <= t < f.end and u < f.probability
        if not hit:
            continue
        if f.kind == "misfire":
            burn = 0.0
        elif f.kind == "partial_burn":
            burn = min(burn, f.fraction)
        else:
            retard += f.degrees
    return burn, retard


def event_params(
    scenario: Scenario,
    engine: Engine,
    *,
    rpm: np.ndarray,
    throttle: np.ndarray,
    burn_fraction: np.ndarray,
    retard: np.ndarray,
    fuel_cut: np.ndarray,
    rough: np.ndarray,
    heat_noise: np.ndarray,
    phase_noise: np.ndarray,
    cylinder_factor: np.ndarray | float = 1.0,
) -> EventParams:
    """Combustion parameters from the frozen decisions and the operating point of each event."""
    phys = scenario.physics
    p_man = maps.manifold_pressure(rpm, throttle)
    p_ivc = p_man * maps.volumetric_efficiency(rpm)
    load = maps.load_fraction(p_man)
    afr = maps.air_fuel_ratio(load)
    q_full = combustion.charge_heat(p_ivc, engine, phys.compression_ratio, afr)
    scatter = np.clip(1.0 + phys.combustion_cov * heat_noise, 0.3, None)
    heat = q_full * scatter * burn_fraction * cylinder_factor
    start = maps.combustion_start(rpm, load) + retard + phys.phasing_scatter_deg * phase_noise
    return EventParams(
        p_man=p_man, p_ivc=p_ivc, heat=heat, start=start, duration=maps.burn_duration(rpm),
        burn_fraction=burn_fraction, retard=retard, fuel_cut=fuel_cut, rough=rough, rpm=rpm,
        throttle=throttle,
    )


def local_grid() -> np.ndarray:
    """Local angles of one event, degrees from firing TDC, [-360, 360) on the simulation grid."""
    return -360.0 + GRID_STEP_DEG * np.arange(N_GRID)


def cylinder_torque(phi_deg: np.ndarray, engine: Engine, scenario: Scenario,
                    **params) -> np.ndarray:
    """Gas torque of one cylinder at local angles ``phi_deg``, N·m (params broadcast)."""
    from crankbeat.dsp.kinematics import gas_torque_factor

    phys = scenario.physics
    p = combustion.pressure(
        phi_deg, engine=engine, compression_ratio=phys.compression_ratio,
        n_compression=phys.polytropic_compression, n_expansion=phys.polytropic_expansion,
        a=phys.wiebe_a, m=phys.wiebe_m, **params,
    )
    area = np.pi * engine.bore_m**2 / 4.0
    lever = gas_torque_factor(phi_deg, r=engine.crank_radius_m, l=engine.conrod_m)
    return (p - combustion.P_CRANKCASE) * area * lever


class WorkTable:
    """Per-cycle gas-work summaries of each cylinder, fired and motored, on an rpm × throttle grid.

    Only the first pass uses it, to steer the crank before the exact traces are known. For a
    crank window [0, 720) it holds each cylinder's work W_k and the window mean of its cumulative
    work M_k (both linear in the torque, so cylinders add), and the detrended variance V of an
    all-fired window.
    """

    def __init__(self, engine: Engine, scenario: Scenario, fire_deg: np.ndarray) -> None:
        self.rpm = np.linspace(500.0, 12000.0, 24)
        self.thr = np.linspace(0.0, 100.0, 21)
        R, T = np.meshgrid(self.rpm, self.thr, indexing="ij")
        z = np.zeros_like(R)
        j = GRID_STEP_DEG * np.arange(N_GRID + 1)
        h = np.deg2rad(GRID_STEP_DEG)
        ramp = np.arange(N_GRID) / N_GRID
        self.w = np.zeros((2, engine.n_cylinders) + R.shape)
        self.m = np.zeros_like(self.w)
        total = 0.0
        for b, burn in enumerate((0.0, 1.0)):
            ep = event_params(scenario, engine, rpm=R, throttle=T, burn_fraction=z + burn,
                              retard=z, fuel_cut=z.astype(bool), rough=z.astype(bool),
                              heat_noise=z, phase_noise=z)
            for k in range(engine.n_cylinders):
                phi = j - fire_deg[k]
                local = phi - 720.0 * np.floor((phi + 360.0) / 720.0)
                tq = cylinder_torque(
                    local, engine, scenario, p_manifold=ep.p_man[..., None],
                    p_ivc=ep.p_ivc[..., None], heat_j=ep.heat[..., None],
                    start_deg=ep.start[..., None], duration_deg=ep.duration[..., None],
                )
                steps = np.cumsum(0.5 * (tq[..., 1:] + tq[..., :-1]) * h, axis=-1)
                cum = np.concatenate((np.zeros(R.shape + (1,)), steps), axis=-1)
                self.w[b, k], self.m[b, k] = cum[..., -1], cum[..., :-1].mean(axis=-1)
                if burn == 1.0:
                    total = total + cum
        self.v = (total[..., :-1] - total[..., -1:] * ramp).var(axis=-1)

    def _cell(self, rpm: float, throttle: float) -> tuple[int, int, float, float]:
        fi = (min(max(rpm, 500.0), 11999.0) - 500.0) / (self.rpm[1] - self.rpm[0])
        fj = min(max(throttle, 0.0), 99.999) / (self.thr[1] - self.thr[0])
        i, j = int(fi), int(fj)
        return i, j, fi - i, fj - j

    @staticmethod
    def _bl(a: np.ndarray, i: int, j: int, u: float, v: float) -> float:
        return float((a[i, j] * (1 - u) + a[i + 1, j] * u) * (1 - v)
                     + (a[i, j + 1] * (1 - u) + a[i + 1, j + 1] * u) * v)

    def summary(self, rpm: float, throttle: float, burns) -> tuple[float, float, float]:
        """(W, M, V) of one window whose cylinders burn the fractions ``burns``; scalars."""
        i, j, u, v = self._cell(rpm, throttle)
        w = m = 0.0
        for k, burn in enumerate(burns):
            w0, w1 = self._bl(self.w[0, k], i, j, u, v), self._bl(self.w[1, k], i, j, u, v)
            m0, m1 = self._bl(self.m[0, k], i, j, u, v), self._bl(self.m[1, k], i, j, u, v)
            w += w0 + burn * (w1 - w0)
            m += m0 + burn * (m1 - m0)
        return w, m, self._bl(self.v, i, j, u, v)


class GasTorque:
    """Total gas torque of all cylinders on the crank-window grid, for blocks of windows.

    Window c covers crank angles [720c, 720c + 720] on the simulation grid (N_GRID + 1 points,
    the last repeating the next window's first). Each cylinder's local angle along a window is
    the same vector for every window, so its volume terms are computed once per cylinder.
    """

    def __init__(self, engine: Engine, scenario: Scenario, params: EventParams,
                 fire_deg: np.ndarray) -> None:
        from crankbeat.dsp.kinematics import gas_torque_factor

        phys = scenario.physics
        j = GRID_STEP_DEG * np.arange(N_GRID + 1)
        area = np.pi * engine.bore_m**2 / 4.0
        self.params = params
        self.cyl = []
        for k in range(engine.n_cylinders):
            phi = j - fire_deg[k]
            shift = np.floor((phi + 360.0) / 720.0).astype(np.int64)
            local = phi - 720.0 * shift
            kern = combustion.PressureKernel(
                local, engine=engine, compression_ratio=phys.compression_ratio,
                n_compression=phys.polytropic_compression, n_expansion=phys.polytropic_expansion,
                a=phys.wiebe_a, m=phys.wiebe_m,
            )
            lever = area * gas_torque_factor(local, r=engine.crank_radius_m, l=engine.conrod_m)
            kf, pe = kern.event_constants(p_ivc=params.p_ivc[:, k], heat_j=params.heat[:, k],
                                          start_deg=params.start[:, k],
                                          duration_deg=params.duration[:, k])
            # Columns where the window passes from one event of the cylinder to the next.
            cuts = np.flatnonzero(np.diff(shift)) + 1
            pieces = np.split(np.arange(N_GRID + 1), cuts)
            spans = [(p[0], p[-1] + 1, int(shift[p[0]])) for p in pieces]
            self.cyl.append((k, kern, lever, kf, pe, spans))

    def block(self, c0: int, c1: int) -> np.ndarray:
        """Gas torque of windows c0..c1-1, N·m, shape (c1 - c0, N_GRID + 1)."""
        pr = self.params
        total = np.zeros((c1 - c0, N_GRID + 1))
        for k, kern, lever, kf, pe, pieces in self.cyl:
            for a, b, sh in pieces:
                rows = np.arange(c0, c1) + sh + 1  # params row 0 is cycle -1
                def col(arr, rows=rows, k=k):
                    return arr[rows, k][:, None]

                p = kern(p_manifold=col(pr.p_man), p_ivc=col(pr.p_ivc), start_deg=col(pr.start),
                         duration_deg=col(pr.duration), k_fired=kf[rows][:, None],
                         p_evo=pe[rows][:, None], cols=slice(a, b))
                total[:, a:b] += (p - combustion.P_CRANKCASE) * lever[a:b]
        return total
