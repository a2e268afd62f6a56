"""A closed-loop, beat-averaged model of the circulation.

Size: one model: its state, controls, implicit step and read-out follow one derivation, read
together (the equations would scatter if split).

Five compartments in a ring, each a compliance with an unstressed volume::

    systemic arteries (SA) -> systemic veins (SV) -> right atrium (RA)
        -> pulmonary arteries (PA) -> pulmonary veins and left atrium (PV) -> SA

    pressure  p_i = (V_i - V0_i) / C_i                                   [mm[Hg]]
    q_sys = (p_SA - p_SV) / R_sys                     systemic flow        [mL/s]
    q_vr  = (p_SV - max(p_RA, p_collapse)) / R_vr     venous return (waterfall)
    q_R   = HR/60 * SV_R(p_RA, p_PA)                  right ventricle
    q_pul = (p_PA - p_PV) / R_pul                     pulmonary flow
    q_L   = HR/60 * SV_L(p_PV, p_SA)                  left ventricle
    dV_i/dt = q_(i-1) - q_i  (+ infusion, - bleeding, + capillary exchange on SV)

Each ventricle is a Frank-Starling pump (Patterson and Starling 1914): stroke volume rises
with its filling pressure towards a plateau, scaled by contractility and slightly reduced by
the pressure it ejects into::

    SV = E * SVmax * (1 - exp(-(p_fill - P0) / k)) * (1 - a * (p_out - p_out_ref)) * phi(HR)

Venous return is not a formula of its own: it is the flow through R_vr, and the right atrial
pressure settles where it equals the right heart's output (Guyton AC, Physiol Rev 1955;35:123).
At steady state every flow in the ring is equal. The arterial baroreflex moves heart rate,
contractility, systemic resistance and venous unstressed volume towards an arterial pressure
set-point, each through a saturating (tanh) gain and a first-order lag; the pressure it
senses is the mean plus a share of the pulse pressure's departure from rest (baroreceptors
respond to pulsatile stretch too), so a narrowing pulse pressure drives it as well.

Integration: the five volumes are advanced with the linearly implicit (Rosenbrock) Euler
method, ``(I - h J) dV = h f(V)``, with the analytic Jacobian ``J``; the reflex states are
advanced exactly for their first-order lags with the pressures of the step. The scheme is
stable at any step (the fastest hemodynamic modes, about 0.1 s, are damped, not amplified),
conserves blood volume to rounding (every column of ``J`` sums to zero) and has the model's
steady state as its fixed point, so left and right output are equal there. The default step
is 1 s, about one heartbeat, which is the resolution of a beat-averaged model; results agree
with a 0.1 s step to within a few tenths of a unit (tests check it). Every array has one
entry per bed, so a ward is simulated in one pass.

Parameter values and their sources are in :mod:`simulators.patient` and docs/simulators.md.
"""

from __future__ import annotations

from dataclasses import dataclass, fields
from typing import Iterable, Sequence

import numpy as np

from .patient import Params, Patient

__all__ = ["Circulation", "Controls", "SA", "SV", "RA", "PA", "PV", "COMPARTMENTS", "READOUT"]

SA, SV, RA, PA, PV = range(5)
#: rows of :meth:`Circulation.readout`
READOUT = ("HR", "ABP_SYS", "ABP_DIA", "ABP_MEAN", "CVP", "PAP_SYS", "PAP_DIA", "PAP_MEAN",
           "PAWP", "CO", "SV")
COMPARTMENTS = ("systemic arteries", "systemic veins", "right atrium",
                "pulmonary arteries", "pulmonary veins and left atrium")

# Cyclic tridiagonal pattern of the Jacobian: flow k runs from compartment k to k + 1 (mod 5).
_I = np.arange(5)
_DIAG = (_I, _I)
_SUB = (_I, (_I - 1) % 5)     # d f_i / d p_(i-1)
_SUP = (_I, (_I + 1) % 5)     # d f_i / d p_(i+1)
_PREV = (_I - 1) % 5
_ROWS = np.concatenate([_DIAG[0], _SUB[0], _SUP[0]])
_COLS = np.concatenate([_DIAG[1], _SUB[1], _SUP[1]])


@dataclass
class Controls:
    """Time-varying inputs of the model (what scenarios act on). One value per bed.

    Multipliers are 1 and shifts 0 when neutral. Set an attribute to a scalar or an array.
    """

    contractility_left: np.ndarray      # multiplier of the left ventricle's E
    contractility_right: np.ndarray     # multiplier of the right ventricle's E
    svr_factor: np.ndarray              # multiplier of R_sys
    pvr_factor: np.ndarray              # multiplier of R_pul
    venous_capacity_factor: np.ndarray  # multiplier of the systemic veins' unstressed volume
    muscle_pump_ml: np.ndarray          # venous blood squeezed out of the capacity (mL)
    hr_drive: np.ndarray                # additive heart rate drive (fever, central command) /min
    setpoint_shift: np.ndarray          # shift of the baroreflex set-point (mm[Hg])
    infusion_ml_min: np.ndarray         # fluid given into the systemic veins
    infusion_retained: np.ndarray       # 1: stays (colloid, blood); 0: redistributes (crystalloid)
    bleed_ml_min: np.ndarray            # blood lost from the systemic veins
    reflex_gain: np.ndarray             # 1: baroreflex on; 0: open loop

    @classmethod
    def neutral(cls, n: int) -> "Controls":
        one, zero = np.ones(n), np.zeros(n)
        return cls(one.copy(), one.copy(), one.copy(), one.copy(), one.copy(), zero.copy(),
                   zero.copy(), zero.copy(), zero.copy(), zero.copy(), zero.copy(), one.copy())

    def __setattr__(self, name: str, value) -> None:
        cur = self.__dict__.get(name)
        if cur is not None:
            cur[...] = value          # keep the array (and its length); broadcast scalars
        else:
            object.__setattr__(self, name, np.array(value, dtype=float))


class Circulation:
    """The circulation of one or more beds (patients or their parameters), advanced together.

    ``dt`` is the integration step in seconds (1.0 by default: the scheme is stable at any
    step, and results at 1 s agree with those at 0.1 s to within a few tenths of a unit).

    >>> from simulators.patient import Patient
    >>> c = Circulation(Patient.reference())
    >>> c.settle()
    >>> round(float(c.cardiac_output[0]), 1), round(float(c.pmsf[0]), 1)
    (5.4, 7.0)
    >>> c.controls.bleed_ml_min = 100.0; c.run(300)      # 500 mL in 5 minutes
    >>> round(float(c.hr[0])), round(float(c.map[0])), round(float(c.blood_volume[0] - c.par["volume"][0]))
    (81, 93, -495)
    """

    def __init__(self, beds: Patient | Params | Sequence[Patient | Params],
                 dt: float = 1.0) -> None:
        if isinstance(beds, (Patient, Params)):
            beds = [beds]
        params = [Params.for_patient(b) if isinstance(b, Patient) else b for b in beds]
        if not params:
            raise ValueError("Circulation needs at least one bed")
        self.n = len(params)
        self.dt = float(dt)
        self.par: dict[str, np.ndarray] = {
            f.name: np.array([getattr(p, f.name) for p in params], dtype=float)
            for f in fields(Params)}
        par = self.par
        self.C = np.stack([par["c_sa"], par["c_sv"], par["c_ra"], par["c_pa"], par["c_pv"]], 1)
        self.V0 = np.stack([par["v0_sa"], par["v0_sv"], par["v0_ra"], par["v0_pa"],
                            par["v0_pv"]], 1)
        # start every compartment at its design pressure
        p_design = np.stack([par["map0"], par["psv0"], par["cvp0"], par["pap0"],
                             par["pawp0"]], 1)
        self.V = self.V0 + self.C * p_design
        self.controls = Controls.neutral(self.n)
        self.volume_target = par["volume"].copy()   # what capillary exchange restores
        # reflex effector states (deviations from baseline): heart rate (/min),
        # contractility and resistance (fractions), venous unstressed volume (mL)
        self._effectors = np.zeros((4, self.n))
        self.d_hr, self.d_contr, self.d_svr, self.d_v0 = self._effectors
        self.t = 0.0
        # constants of the two pumps, stacked [right, left], and of the integrator
        self._p0 = np.stack([par["p0_r"], par["p0_l"]])
        self._k = np.stack([par["k_r"], par["k_l"]])
        self._svmax = np.stack([par["svmax_r"], par["svmax_l"]])
        self._after = np.stack([par["afterload_r"], par["afterload_l"]])
        self._ref = np.stack([par["pap0"], par["map0"]])
        self._v0_buf = self.V0.copy()
        self._invC = 1.0 / self.C
        self._invC_cols = self._invC[:, _COLS]
        self._A = np.zeros((self.n, 5, 5))
        self._a = np.zeros((self.n, 5))
        self._b = np.zeros((self.n, 5))
        self._decay: tuple[float, np.ndarray] | None = None
        self._jac: tuple[np.ndarray, np.ndarray] | None = None
        self._update_outputs()

    # ------------------------------------------------------------------ effective parameters

    def _effective(self):
        par, ctl = self.par, self.controls
        hr = np.minimum(np.maximum(par["hr0"] + ctl.hr_drive + self.d_hr, 25.0), 220.0)
        e = np.stack([ctl.contractility_right, ctl.contractility_left]) * (1.0 + self.d_contr)
        r_sys = par["r_sys"] * ctl.svr_factor * (1.0 + self.d_svr)
        r_pul = par["r_pul"] * ctl.pvr_factor
        v0 = self._v0_buf
        v0[:, SV] = (par["v0_sv"] * ctl.venous_capacity_factor - ctl.muscle_pump_ml
                     + self.d_v0)
        return hr, e, r_sys, r_pul, v0

    # ------------------------------------------------------------------ right-hand side

    def _flows(self, hr, e, r_sys, r_pul, v0, jac: bool):
        """Pressures, the five flows (mL/s), the two stroke volumes and, with ``jac``,
        the flows' derivatives with respect to their upstream (a) and downstream (b)
        pressures."""
        par = self.par
        p = (self.V - v0) * self._invC
        q = np.empty_like(p)
        g_sys, g_vr, g_pul = 1.0 / r_sys, 1.0 / par["r_vr"], 1.0 / r_pul
        pc = par["p_collapse"]
        open_ = p[:, RA] > pc
        q[:, 0] = (p[:, SA] - p[:, SV]) * g_sys
        q[:, 1] = (p[:, SV] - np.maximum(p[:, RA], pc)) * g_vr
        q[:, 3] = (p[:, PA] - p[:, PV]) * g_pul
        # the two Starling pumps side by side: [right, left]
        beat = hr * (1.0 / 60.0) * _filling_time_factor(hr)
        fill = p[:, (RA, PV)].T
        x = fill - self._p0
        ex = np.exp(-np.maximum(x, 0.0) / self._k)
        g = 1.0 - ex
        h_raw = 1.0 - self._after * (p[:, (PA, SA)].T - self._ref)
        h = np.minimum(np.maximum(h_raw, 0.2), 1.3)
        smax = beat * self._svmax * e
        sv_beat = self._svmax * e * g * h
        q[:, 2] = smax[0] * g[0] * h[0]
        q[:, 4] = smax[1] * g[1] * h[1]
        if not jac:
            return p, q, sv_beat * _filling_time_factor(hr), None, None
        a, b = self._a, self._b
        a[:, 0], b[:, 0] = g_sys, -g_sys
        a[:, 1], b[:, 1] = g_vr, np.where(open_, -g_vr, 0.0)
        a[:, 3], b[:, 3] = g_pul, -g_pul
        dfill = smax * np.where(x > 0, ex / self._k, 0.0) * h
        dout = smax * g * np.where((h_raw > 0.2) & (h_raw < 1.3), -self._after, 0.0)
        a[:, 2], b[:, 2] = dfill[0], dout[0]
        a[:, 4], b[:, 4] = dfill[1], dout[1]
        return p, q, sv_beat * _filling_time_factor(hr), a, b

    def _inputs(self) -> np.ndarray:
        """External flows into the systemic veins (mL/s): infusion, bleeding, exchange."""
        ctl = self.controls
        gap = self.volume_target - self.V.sum(1)
        tau = np.where(gap < 0, self.par["tau_leak"], self.par["tau_refill"])
        return (ctl.infusion_ml_min - ctl.bleed_ml_min) * (1.0 / 60.0) + gap / tau

    # ------------------------------------------------------------------ stepping

    def step(self) -> None:
        """Advance every bed by one step ``dt`` with the present controls."""
        self.prepare()
        self._advance()

    def prepare(self) -> None:
        """Evaluate flows and their derivatives at the present state and controls.

        The outputs (pressures, flows, :meth:`readout`) then describe this instant; the
        next :meth:`step` (or :meth:`advance`) reuses the evaluation instead of repeating it.
        """
        hr, e, r_sys, r_pul, v0 = self._effective()
        p, q, sv, a, b = self._flows(hr, e, r_sys, r_pul, v0, jac=True)
        self._p, self._q, self._sv, self._hr, self._r_sys = p, q, sv, hr, r_sys
        self._v0 = v0.copy()
        self._jac = (a.copy(), b.copy())
        self._dirty = False

    def advance(self) -> None:
        """Take the step prepared by :meth:`prepare` (which must have been called since the
        state or the controls last changed)."""
        if self._jac is None:
            raise RuntimeError("advance() needs prepare() first")
        self._advance()

    def _advance(self) -> None:
        h = self.dt
        q, v0 = self._q, self._v0
        assert self._jac is not None          # advance() checked it
        a, b = self._jac
        self._jac = None
        # f_i = q_(i-1) - q_i, plus the external flows into the systemic veins
        f = q[:, _PREV] - q
        f[:, SV] += self._inputs()
        # M = d f / d p is cyclic tridiagonal: diagonal b_(i-1) - a_i, below a_(i-1),
        # above -b_i. J = M diag(1/C); solve (I - h J) dV = h f.
        vals = np.concatenate([b[:, _PREV] - a, a[:, _PREV], -b], 1)
        A = self._A
        A[:, _ROWS, _COLS] = vals * self._invC_cols * (-h)
        A[:, _I, _I] += 1.0
        self.V += np.linalg.solve(A, (h * f)[..., None])[..., 0]
        ctl = self.controls
        # retained infusions (colloid, blood) raise the volume that exchange restores
        self.volume_target += ctl.infusion_ml_min * ctl.infusion_retained * (h / 60.0)
        self.t += h
        # baroreflex with the new arterial pressure and the step's pulse pressure
        self._reflex((self.V[:, SA] - v0[:, SA]) * self._invC[:, SA]
                     + self.par["pp_weight"] * (self._sv[1] * self._invC[:, SA]
                                                - self.par["pp0"]), h)
        self._dirty = True

    def _reflex(self, p_sa: np.ndarray, h: float) -> None:
        par = self.par
        if self._decay is None or self._decay[0] != h:
            taus = np.stack([par["tau_hr"], par["tau_contr"], par["tau_svr"], par["tau_v0"]])
            self._decay = (h, 1.0 - np.exp(-h / taus))
            self._gain_up = np.stack([par["g_hr_up"], par["g_contr_up"], par["g_svr_up"],
                                      -par["g_v0_up"] * par["v0_sv"]])
            self._gain_down = np.stack([par["g_hr_down"], par["g_contr_down"],
                                        par["g_svr_down"], -par["g_v0_down"] * par["v0_sv"]])
        act = np.tanh((par["setpoint"] + self.controls.setpoint_shift - p_sa)
                      / par["reflex_slope"]) * self.controls.reflex_gain
        target = act * np.where(act > 0, self._gain_up, self._gain_down)
        eff = self._effectors
        eff += (target - eff) * self._decay[1]

    def run(self, seconds: float) -> None:
        """Advance by ``seconds`` (a whole number of steps)."""
        for _ in range(int(round(seconds / self.dt))):
            self.step()
        self._update_outputs()

    def settle(self, seconds: float = 1800.0, tol: float = 1e-7) -> None:
        """Run with the present controls until the volumes stop moving (or ``seconds``).

        Used before a scenario starts, so that its first second is a steady state.
        """
        steps = int(round(seconds / self.dt))
        for i in range(steps):
            before = self.V.copy()
            self.step()
            if i > 20 and np.max(np.abs(self.V - before)) < tol * self.dt:
                break
        self._update_outputs()

    # ------------------------------------------------------------------ outputs

    def _update_outputs(self) -> None:
        hr, e, r_sys, r_pul, v0 = self._effective()
        p, q, sv, _, _ = self._flows(hr, e, r_sys, r_pul, v0, jac=False)
        self._p, self._q, self._sv, self._hr, self._v0 = p, q, sv, hr, v0.copy()
        self._r_sys = r_sys
        self._dirty = False

    def _out(self):
        if self._dirty:
            self._update_outputs()
        return self

    @property
    def pressures(self) -> np.ndarray:
        """(beds, 5) compartment pressures in mm[Hg], in :data:`COMPARTMENTS` order."""
        return self._out()._p

    @property
    def flows(self) -> np.ndarray:
        """(beds, 5) flows in L/min: systemic, venous return, right heart, pulmonary, left heart."""
        return self._out()._q * 0.06

    @property
    def hr(self) -> np.ndarray:
        return self._out()._hr

    @property
    def map(self) -> np.ndarray:
        return self.pressures[:, SA]

    @property
    def cvp(self) -> np.ndarray:
        return self.pressures[:, RA]

    @property
    def pap_mean(self) -> np.ndarray:
        return self.pressures[:, PA]

    @property
    def pawp(self) -> np.ndarray:
        """Left atrial pressure, which the wedged pulmonary artery catheter reads."""
        return self.pressures[:, PV]

    @property
    def sv_left(self) -> np.ndarray:
        return self._out()._sv[1]

    @property
    def sv_right(self) -> np.ndarray:
        return self._out()._sv[0]

    @property
    def cardiac_output(self) -> np.ndarray:
        """Left ventricular output, L/min."""
        return self.flows[:, 4]

    @property
    def right_output(self) -> np.ndarray:
        return self.flows[:, 2]

    @property
    def venous_return(self) -> np.ndarray:
        return self.flows[:, 1]

    @property
    def svr(self) -> np.ndarray:
        """Effective systemic resistance, mm[Hg].min/L."""
        return self._out()._r_sys / 0.06

    @property
    def pulse_pressure(self) -> np.ndarray:
        """Arterial pulse pressure from stroke volume and arterial compliance (mm[Hg])."""
        return self.sv_left / self.C[:, SA]

    @property
    def pa_pulse_pressure(self) -> np.ndarray:
        return self.sv_right / self.C[:, PA]

    @property
    def abp_sys(self) -> np.ndarray:
        """Systolic pressure synthesised around the mean: MAP = DIA + PP/3 (common practice)."""
        return self.map + self.pulse_pressure * (2.0 / 3.0)

    @property
    def abp_dia(self) -> np.ndarray:
        return self.map - self.pulse_pressure / 3.0

    @property
    def pap_sys(self) -> np.ndarray:
        return self.pap_mean + self.pa_pulse_pressure * (2.0 / 3.0)

    @property
    def pap_dia(self) -> np.ndarray:
        return self.pap_mean - self.pa_pulse_pressure / 3.0

    @property
    def blood_volume(self) -> np.ndarray:
        return self.V.sum(1)

    @property
    def pmsf(self) -> np.ndarray:
        """Mean systemic filling pressure: the pressure the systemic arteries and veins would
        share with the heart stopped and the blood redistributed (Guyton 1955)."""
        v0 = self._out()._v0
        stressed = self.V[:, SA] + self.V[:, SV] - v0[:, SA] - v0[:, SV]
        return stressed / (self.C[:, SA] + self.C[:, SV])

    def readout(self) -> np.ndarray:
        """(11, beds): HR, ABP sys/dia/mean, CVP, PAP sys/dia/mean, PAWP, CO, SV, in one pass
        (what a monitor shows; the order of :data:`READOUT`)."""
        o = self._out()
        p, sv = o._p, o._sv
        pp = sv[1] * self._invC[:, SA]
        ppa = sv[0] * self._invC[:, PA]
        return np.stack([o._hr, p[:, SA] + pp * (2.0 / 3.0), p[:, SA] - pp / 3.0, p[:, SA],
                         p[:, RA], p[:, PA] + ppa * (2.0 / 3.0), p[:, PA] - ppa / 3.0,
                         p[:, PA], p[:, PV], o._q[:, 4] * 0.06, sv[1]])

    def snapshot(self, bed: int = 0) -> dict[str, float]:
        """The main values of one bed as plain floats (for tests and debugging)."""
        return {
            "HR": float(self.hr[bed]), "MAP": float(self.map[bed]),
            "SBP": float(self.abp_sys[bed]), "DBP": float(self.abp_dia[bed]),
            "CVP": float(self.cvp[bed]), "PAP": float(self.pap_mean[bed]),
            "PAWP": float(self.pawp[bed]), "CO": float(self.cardiac_output[bed]),
            "CO_R": float(self.right_output[bed]), "VR": float(self.venous_return[bed]),
            "SV": float(self.sv_left[bed]), "SVR": float(self.svr[bed] * 80.0),
            "PMSF": float(self.pmsf[bed]), "BV": float(self.blood_volume[bed]),
        }

    # ------------------------------------------------------------------ Guyton's experiment

    def venous_return_curve(self, pra: Iterable[float], bed: int = 0,
                            settle_s: float = 300.0) -> np.ndarray:
        """Venous return (L/min) with the heart clamped and right atrial pressure imposed.

        Guyton's preparation: the heart and lungs are replaced by a pump that takes whatever
        reaches the right atrium and returns it to the systemic arteries, its rate servoed to
        hold right atrial pressure at each value; the reflexes are held open (effectors fixed
        at their present values). The systemic arteries and veins of bed ``bed`` keep their
        volume, compliances and resistances, and the flows use the model's own laws
        (including the waterfall at the thoracic inlet). Each value is the steady state.
        """
        pra = np.asarray(list(pra), dtype=float)
        m = len(pra)
        hr, e, r_sys, r_pul, v0 = self._effective()
        c_sa, c_sv = self.C[bed, SA], self.C[bed, SV]
        v0_sa, v0_sv = v0[bed, SA], v0[bed, SV]
        r_vr, pc = self.par["r_vr"][bed], self.par["p_collapse"][bed]
        g_sys, g_vr = 1.0 / r_sys[bed], 1.0 / r_vr
        v = np.tile([self.V[bed, SA], self.V[bed, SV]], (m, 1))
        h = 0.5
        for _ in range(int(settle_s / h)):
            p_sa = (v[:, 0] - v0_sa) / c_sa
            p_sv = (v[:, 1] - v0_sv) / c_sv
            q_sys = (p_sa - p_sv) * g_sys
            open_ = pra > pc
            q_vr = np.maximum(p_sv - np.where(open_, pra, pc), 0.0) * g_vr
            # pump returns q_vr to the arteries: dV_sa = q_vr - q_sys, dV_sv = q_sys - q_vr
            f = q_vr - q_sys
            # implicit Euler on the single free mode (total volume is fixed)
            dfdv_sa = -g_sys / c_sa
            dfdv_sv = (g_vr + g_sys) / c_sv
            jac = dfdv_sa - dfdv_sv            # d f / d V_sa with V_sv = total - V_sa
            dv = h * f / (1.0 - h * jac)
            v[:, 0] += dv
            v[:, 1] -= dv
        p_sv = (v[:, 1] - v0_sv) / c_sv
        return np.maximum(p_sv - np.where(pra > pc, pra, pc), 0.0) * g_vr * 0.06


def _filling_time_factor(hr: np.ndarray) -> np.ndarray:
    """Stroke volume lost to the shorter diastole at high heart rates: 1 up to 120/min,
    0.91 at 150, 0.75 at 170 (a qualitative shape, from memory)."""
    x = np.maximum(hr - 120.0, 0.0) / 100.0
    return np.maximum(1.0 - x * x, 0.3)

