"""Physics generators behind the record simulator (pure numpy/scipy; invented data only).

* ``mathieu_growing``: exact solution of the damped Mathieu equation after onset, built from the fundamental
  matrix over one forcing period and powers of the monodromy matrix (Floquet theory), with a Landau-type
  amplitude saturation A' = lambda A (1 - A^2 / A_sat^2) applied to the envelope.
* ``mathieu_precursor``: the noise-excited mode below threshold in the averaged (slow-flow) description: two
  quadratures at W/2 that decay at zeta w0 -+ s_par (methods note 6.2), generated exactly as AR(1) processes.
* ``two_mode_slow`` / ``two_mode_ode``: the 2:1 autoparametric pair with quadratic coupling (Nayfeh & Mook,
  *Nonlinear Oscillations*, 6.5): a first-order averaged slow flow (fast) and the full ODE (exact, DOP853).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from scipy.integrate import solve_ivp
from scipy.signal import lfilter

from analysis.physics.stability import floquet_growth

TWO_PI = 2.0 * math.pi


def mathieu_growing(
    t: np.ndarray,
    *,
    f0_hz: float,
    zeta: float,
    forcing_hz: float,
    modulation: float,
    t0: float,
    a_start: float,
    a_sat: float,
    x0: np.ndarray,
) -> tuple[np.ndarray, dict]:
    """Acceleration of the parametrically excited mode from onset ``t0`` (zero before).

    The linear solution is exact: state(t0 + nT + s) = Phi(s) M^n x0, with Phi from one DOP853 pass over
    a period. It is normalised by exp(lambda (t - t0)) and multiplied by the saturating envelope
    a_start / sqrt(exp(-2 lambda tau)(1 - k) + k), k = (a_start / a_sat)^2, which grows at exactly lambda
    while small and settles at ``a_sat``. ``a_start``/``a_sat`` are peak amplitudes of the W/2 line of the
    acceleration. ``t0`` must be a whole number of forcing periods. Returns (acceleration, info).
    """
    w0, big_w = TWO_PI * f0_hz, TWO_PI * forcing_hz
    period = 1.0 / forcing_hz
    lam = floquet_growth(f0_hz, zeta, forcing_hz, modulation).growth_rate_per_s
    c, k0 = 2.0 * zeta * w0, w0 * w0

    def rhs(s, y):
        k = k0 * (1.0 + modulation * math.cos(big_w * s))
        return [y[1], -c * y[1] - k * y[0], y[3], -c * y[3] - k * y[2]]

    one = solve_ivp(
        rhs,
        (0.0, period),
        [1.0, 0.0, 0.0, 1.0 / w0],
        method="DOP853",
        rtol=1e-11,
        atol=1e-14,
        dense_output=True,
    )
    # coefficients z of the two basic solutions (started from [1, 0] and [0, 1/w0]) map over one period
    # through C = P(0)^-1 P(T)
    m = np.diag([1.0, w0]) @ one.y[:, -1].reshape(2, 2).T
    rho, vec = np.linalg.eig(m)
    coef = np.linalg.solve(vec, np.asarray(x0, dtype=complex))
    decay = np.exp(-lam * period)  # normalise: |rho_dominant| * decay = 1
    tau = np.asarray(t, dtype=float) - t0
    after = tau >= 0
    ta = tau[after]
    n = np.floor(ta / period + 1e-12)
    s = ta - n * period
    phi = one.sol(np.clip(s, 0.0, period))  # (4, N)
    # state in physical units: x = Phi11 * z1 + Phi12 * z2, x' likewise, where z = M^n x0 (normalised)
    z = np.zeros((2, ta.size), dtype=complex)
    for i in range(2):
        z += np.outer(vec[:, i], coef[i] * (rho[i] * decay) ** n)
    z = z.real * np.exp(-lam * s)[None, :]
    x = phi[0] * z[0] + phi[2] * z[1]
    v = phi[1] * z[0] + phi[3] * z[1]
    acc_lin = -c * v - k0 * (1.0 + modulation * np.cos(big_w * ta)) * x
    # W/2 and 3W/2 content of the normalised periodic part, from two periods of the dominant solution
    lines = _half_order_lines(one, rho, vec, lam, period, c, k0, modulation, big_w)
    dom = abs(coef[int(np.argmax(np.abs(rho)))])
    k = (a_start / a_sat) ** 2
    env = (
        a_start / np.sqrt(np.exp(-2.0 * lam * ta) * (1.0 - k) + k) if lam > 0 else a_start * np.exp(lam * ta)
    )
    out = np.zeros_like(tau)
    out[after] = acc_lin / (dom * lines[0]) * env
    return out, {"growth_rate_per_s": lam, "ratio_3_to_1": lines[1] / lines[0]}


def _half_order_lines(one, rho, vec, lam, period, c, k0, modulation, big_w) -> tuple[float, float]:
    """Amplitudes of the W/2 and 3W/2 lines of exp(-lambda t) times the dominant Floquet acceleration."""
    i = int(np.argmax(np.abs(rho)))
    z0 = vec[:, i].real
    ns = 256
    s = np.arange(2 * ns) * (period / ns)
    n = np.floor(s / period + 1e-12)
    sr = s - n * period
    phi = one.sol(sr)
    scale = (np.sign(rho[i].real) ** n) * np.exp(-lam * sr)
    x = (phi[0] * z0[0] + phi[2] * z0[1]) * scale
    v = (phi[1] * z0[0] + phi[3] * z0[1]) * scale
    acc = -c * v - k0 * (1.0 + modulation * np.cos(big_w * sr)) * x
    spec = np.abs(np.fft.rfft(acc)) * 2.0 / acc.size
    return float(spec[1]), float(spec[3])


def _ar1_complex(rho: complex, drive: np.ndarray) -> np.ndarray:
    return lfilter([1.0], [1.0, -rho], drive)


def mathieu_precursor(
    t: np.ndarray,
    rng: np.random.Generator,
    *,
    f0_hz: float,
    zeta: float,
    forcing_hz: float,
    modulation: float,
    rms: float,
) -> tuple[np.ndarray, dict]:
    """Noise-excited mode below threshold near W/2 (acceleration, zero-mean, given total r.m.s.).

    Slow flow in the frame rotating at W/2: [u, v]' = A [u, v] + white noise with
    A = [[-mu, -d - s], [d - s, -mu]], mu = zeta w0, s = h w0 / 4, d = W/2 - w0 (first-order averaging).
    Its eigenvalues -mu +- sqrt(s^2 - d^2) give the two Lorentzian widths of the methods note 6.2.
    """
    w0 = TWO_PI * f0_hz
    mu, sp, d = zeta * w0, modulation * w0 / 4.0, math.pi * forcing_hz - w0
    a = np.array([[-mu, -d - sp], [d - sp, -mu]])
    ev, vec = np.linalg.eig(a.astype(complex))
    if abs(ev[0] - ev[1]) < 1e-9 * mu:  # defective at s = |d|: nudge
        a[0, 1] *= 1.0 + 1e-6
        ev, vec = np.linalg.eig(a.astype(complex))
    dt = float(t[1] - t[0])
    noise = rng.standard_normal((2, t.size)) * math.sqrt(dt)
    w = np.linalg.inv(vec) @ noise  # 2 x 2 inverse applied to all samples at once
    z = np.zeros((2, t.size), dtype=complex)
    for i in range(2):
        z += np.outer(vec[:, i], _ar1_complex(np.exp(ev[i] * dt), w[i]))
    u, v = z.real
    ph = math.pi * forcing_hz * t
    x = u * np.cos(ph) + v * np.sin(ph)
    x -= x.mean()
    x *= rms / max(float(np.sqrt(np.mean(x * x))), 1e-300)
    rates = -ev.real
    return x, {"narrow_rate_per_s": float(rates.min()), "broad_rate_per_s": float(rates.max())}


@dataclass(frozen=True, slots=True)
class TwoModeSetup:
    """The 2:1 autoparametric pair (unit modal masses, alpha1 = w1^2, alpha2 = alpha1 / 2)."""

    f_sub_hz: float
    f_forced_hz: float
    forcing_hz: float
    zeta_sub: float
    zeta_forced: float

    @property
    def w1(self) -> float:
        return TWO_PI * self.f_sub_hz

    @property
    def w2(self) -> float:
        return TWO_PI * self.f_forced_hz

    @property
    def big_w(self) -> float:
        return TWO_PI * self.forcing_hz

    @property
    def alpha1(self) -> float:
        return self.w1**2

    @property
    def gain(self) -> complex:
        """Forced-mode receptance 1 / (w2^2 - W^2 + 2 i mu2 W)."""
        return 1.0 / (self.w2**2 - self.big_w**2 + 2j * self.zeta_forced * self.w2 * self.big_w)

    def threshold_amplitude(self) -> float:
        """a2c = (4 w1 / alpha1) sqrt(mu1^2 + delta1^2) (first-order averaging, methods note 4.2)."""
        mu1, d1 = self.zeta_sub * self.w1, self.big_w / 2.0 - self.w1
        return 4.0 * self.w1 / self.alpha1 * math.hypot(mu1, d1)

    def saturated_sub_amplitude(self, force: float) -> float:
        """a1 above threshold: a1^2 = 16 w1 w2 K / (alpha1 alpha2) (methods note 4.3); 0 below."""
        mu1, mu2 = self.zeta_sub * self.w1, self.zeta_forced * self.w2
        d1, d2 = self.big_w / 2.0 - self.w1, self.big_w - self.w2
        al1 = self.alpha1
        disc = (force * al1 / (8 * self.w1 * self.w2)) ** 2 - (mu1 * d2 + mu2 * d1) ** 2
        if disc <= 0:
            return 0.0
        k = d1 * d2 - mu1 * mu2 + math.sqrt(disc)
        return math.sqrt(16 * self.w1 * self.w2 * k / (al1 * al1 / 2.0)) if k > 0 else 0.0


def two_mode_slow(
    t: np.ndarray,
    rng: np.random.Generator,
    setup: TwoModeSetup,
    *,
    force_before: float,
    force_after: float,
    t0: float,
    noise_sub: float,
) -> tuple[np.ndarray, np.ndarray]:
    """Displacements (u1, u2) from the averaged slow flow (complex amplitudes B1 at W/2, B2 at W).

    B1' = -mu1 B1 - i sigma1 B1 + i alpha1 conj(B1) B2 / (2W),
    B2' = -mu2 B2 - i sigma2 B2 - i (F - alpha2 B1^2 / 2) / (2W),
    sigma1 = (W^2/4 - w1^2) / W, sigma2 = (W^2 - w2^2) / (2W); a small complex white force keeps B1 off zero.
    Integrated with RK4 at 4 ms steps, then interpolated to ``t``.
    """
    mu1, mu2 = setup.zeta_sub * setup.w1, setup.zeta_forced * setup.w2
    big_w, al1 = setup.big_w, setup.alpha1
    al2 = al1 / 2.0
    s1 = (big_w**2 / 4.0 - setup.w1**2) / big_w
    s2 = (big_w**2 - setup.w2**2) / (2.0 * big_w)
    dt = 0.004
    n = int(math.ceil((t[-1] - t[0]) / dt)) + 2
    ts = t[0] + dt * np.arange(n)
    kick = (rng.standard_normal(n) + 1j * rng.standard_normal(n)) * noise_sub * math.sqrt(2.0 * mu1 * dt)

    def f(b1: complex, b2: complex, force: float) -> tuple[complex, complex]:
        d1 = (-mu1 - 1j * s1) * b1 + 1j * al1 * b1.conjugate() * b2 / (2.0 * big_w)
        d2 = (-mu2 - 1j * s2) * b2 - 1j * (force - al2 * b1 * b1 / 2.0) / (2.0 * big_w)
        return d1, d2

    b1 = complex(noise_sub)
    b2 = complex(force_before * setup.gain)
    out1 = np.empty(n, dtype=complex)
    out2 = np.empty(n, dtype=complex)
    for i in range(n):
        out1[i], out2[i] = b1, b2
        force = force_after if ts[i] >= t0 else force_before
        k1 = f(b1, b2, force)
        k2 = f(b1 + 0.5 * dt * k1[0], b2 + 0.5 * dt * k1[1], force)
        k3 = f(b1 + 0.5 * dt * k2[0], b2 + 0.5 * dt * k2[1], force)
        k4 = f(b1 + dt * k3[0], b2 + dt * k3[1], force)
        b1 += dt / 6.0 * (k1[0] + 2 * k2[0] + 2 * k3[0] + k4[0]) + kick[i]
        b2 += dt / 6.0 * (k1[1] + 2 * k2[1] + 2 * k3[1] + k4[1])
    c1 = np.interp(t, ts, out1.real) + 1j * np.interp(t, ts, out1.imag)
    c2 = np.interp(t, ts, out2.real) + 1j * np.interp(t, ts, out2.imag)
    u1 = (c1 * np.exp(0.5j * big_w * t)).real
    u2 = (c2 * np.exp(1j * big_w * t)).real
    return u1, u2


def two_mode_ode(
    t: np.ndarray,
    setup: TwoModeSetup,
    *,
    force: float,
    force_before: float | None = None,
    t0: float = 0.0,
    u1_start: float = 1e-6,
    rtol: float = 1e-10,
) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Exact two-mode ODE (DOP853), forced mode started on its linear steady state (methods note 4.4).

    The force is ``force_before`` until ``t0`` and ``force`` after (a step in load at a known time).
    Returns (u1, u2, u1'', u2'') at the times ``t`` (which must start at 0).
    """
    w1, w2, big_w = setup.w1, setup.w2, setup.big_w
    mu1, mu2 = setup.zeta_sub * w1, setup.zeta_forced * w2
    al1 = setup.alpha1
    al2 = al1 / 2.0
    f_before = force if force_before is None else force_before
    a2 = abs(setup.gain) * f_before
    ph = float(np.angle(setup.gain))

    def rhs_for(f_amp: float):
        def rhs(tt, y):
            return [
                y[1],
                -2 * mu1 * y[1] - w1**2 * y[0] - al1 * y[0] * y[2],
                y[3],
                -2 * mu2 * y[3] - w2**2 * y[2] - al2 * y[0] ** 2 + f_amp * math.cos(big_w * tt),
            ]

        return rhs

    y = np.empty((4, t.size))
    state = [u1_start, 0.0, a2 * math.cos(ph), -a2 * big_w * math.sin(ph)]
    pieces = [(0.0, t0, f_before), (t0, float(t[-1]), force)] if t0 > 0 else [(0.0, float(t[-1]), force)]
    for start, stop, f_amp in pieces:
        sel = (t >= start) & (t <= stop) if stop == float(t[-1]) else (t >= start) & (t < stop)
        sol = solve_ivp(
            rhs_for(f_amp),
            (start, stop),
            state,
            t_eval=t[sel],
            method="DOP853",
            rtol=rtol,
            atol=1e-16,
            max_step=1.0 / (20.0 * setup.forcing_hz),
            dense_output=True,
        )
        y[:, sel] = sol.y
        state = list(sol.sol(stop))
    u1, v1, u2, v2 = y
    f_t = np.where(t < t0, f_before, force)
    acc1 = -2 * mu1 * v1 - w1**2 * u1 - al1 * u1 * u2
    acc2 = -2 * mu2 * v2 - w2**2 * u2 - al2 * u1**2 + f_t * np.cos(big_w * t)
    return u1, u2, acc1, acc2


def onset_envelope(
    t: np.ndarray, a0: float, rate_per_s: float, onset_s: float, a_sat: float | None = None
) -> np.ndarray:
    """Peak amplitude of a steady line that starts growing at ``onset_s``: a0 before, a0·e^{λ(t - t0)} after,
    optionally levelling off by the Landau form A' = λA(1 - A²/A_sat²) (closed form, A_sat > a0)."""
    s = np.maximum(np.asarray(t, dtype=float) - onset_s, 0.0)
    x = 2.0 * rate_per_s * s
    if a_sat is None:
        return a0 * np.exp(0.5 * x)
    q = (a0 / a_sat) ** 2
    return a0 * np.exp(0.5 * (x - np.logaddexp(np.log1p(-q), np.log(q) + x)))


def speed_profile(t: np.ndarray, mean_hz: float, change_pct: float, shape: str) -> np.ndarray:
    """Shaft speed (Hz) at times t with mean about ``mean_hz`` that moves by ``change_pct`` % of it.

    ``ramp``: linear from mean (1 - c/2) to mean (1 + c/2); ``step``: a smooth step (tanh, a tenth of the
    record wide) between the same two speeds at mid-record; ``swing``: one sine period of ± c/2 (a speed
    that rises and falls back). Invented profiles for tests and benchmarks.
    """
    c = change_pct / 100.0
    u = (t - t[0]) / max(float(t[-1] - t[0]), 1e-12)  # 0..1 over the record
    if shape == "ramp":
        rel = c * (u - 0.5)
    elif shape == "step":
        rel = 0.5 * c * np.tanh((u - 0.5) / 0.05)
    elif shape == "swing":
        rel = 0.5 * c * np.sin(2 * np.pi * u)
    else:
        raise ValueError(f"profile must be ramp, step or swing; got {shape!r}")
    return mean_hz * (1.0 + rel)
