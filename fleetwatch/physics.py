"""Pure physics of a variable-ratio friction drive and its DC gear-motor.

Every function takes numpy arrays or scalars (broadcast like numpy), returns float64
(an ``np.float64`` for scalar inputs, an array otherwise) and never raises on singular
cases: a division by a zero speed, current, power or torque gives NaN instead. Formulas and
their sources are in ``/work/shared/domain.md`` (section numbers below refer to it).

Conventions (domain.md 1.1-1.3):

- speeds ``n_*_rpm`` in rpm, angular speeds ``omega_*_rad_s`` in rad/s, torques ``*_nm`` in
  N*m, powers ``*_w`` in W, voltages in V, currents in A, resistances in ohm, lengths in m
  (any one length unit works for the cone functions as long as all arguments share it);
- transmission ratio ``i = n_in / n_out`` (> 1 reduces speed);
- slip ``s = 1 - i_cmd * n_out / n_in``: positive when the output lags.

DC motor constants are referred to the shaft whose speed is passed in: for a gear-motor,
pass the gearbox output (= variator input) speed and the constants come out referred to it.
"""
from __future__ import annotations

from typing import Any

import numpy as np

__all__ = [
    # kinematics and power
    "omega_from_rpm", "rpm_from_omega", "actual_ratio", "slip", "series_slip",
    "ratio_from_slip", "mech_power_w", "output_torque_nm", "efficiency",
    "torque_efficiency",
    # DC motor
    "back_emf_v", "motor_constant", "em_torque_nm", "shaft_torque_nm", "shaft_power_w",
    "motor_efficiency", "locked_rotor_current_a", "armature_current_a", "motor_voltage_v",
    "fit_motor_constants", "winding_resistance", "resistance_at_reference",
    "ALPHA_COPPER_PER_K",
    # cone-and-wheel geometry, spin, traction
    "cone_radii", "cone_ratio", "cone_position", "spin_edge_mismatch",
    "traction_coefficient", "slip_for_traction",
    # induction motor
    "synchronous_speed_rpm", "induction_slip", "rotor_frequency_hz",
]

# Temperature coefficient of resistance of annealed copper near 20 degC, 1/K
# (domain.md 1.4: R_T = R_20 * (1 + 0.00393*(T - 20)), value from memory).
ALPHA_COPPER_PER_K = 0.00393

_TWO_PI_OVER_60 = 2.0 * np.pi / 60.0  # rad/s per rpm (domain.md 1.2: omega = 2*pi*n/60)


# ---------------------------------------------------------------- helpers
def _f(x: Any) -> np.ndarray:
    return np.asarray(x, dtype=np.float64)


def _out(a: np.ndarray) -> Any:
    """Scalar in, ``np.float64`` out; array in, array out."""
    a = np.asarray(a, dtype=np.float64)
    return a[()] if a.ndim == 0 else a


def _div(num: Any, den: Any) -> np.ndarray:
    """num / den with NaN where den == 0 (or either is NaN); never warns."""
    num, den = _f(num), _f(den)
    with np.errstate(divide="ignore", invalid="ignore"):
        q = num / den
    return np.where(den == 0.0, np.nan, q)


# ---------------------------------------------------------------- kinematics and power
def omega_from_rpm(n_rpm: Any) -> Any:
    """Angular speed in rad/s from a speed in rpm (omega = 2*pi*n/60, domain.md 1.2)."""
    return _out(_f(n_rpm) * _TWO_PI_OVER_60)


def rpm_from_omega(omega_rad_s: Any) -> Any:
    """Speed in rpm from an angular speed in rad/s (inverse of ``omega_from_rpm``)."""
    return _out(_f(omega_rad_s) / _TWO_PI_OVER_60)


def actual_ratio(n_in_rpm: Any, n_out_rpm: Any) -> Any:
    """Actual transmission ratio i_act = n_in / n_out (dimensionless, domain.md 1.1).

    NaN where n_out == 0 (the drive stands still or the output sensor reads zero).
    """
    return _out(_div(n_in_rpm, n_out_rpm))


def slip(n_in_rpm: Any, n_out_rpm: Any, ratio_cmd: Any) -> Any:
    """Drive slip s = 1 - ratio_cmd * n_out / n_in (dimensionless, domain.md 1.3).

    Positive when the output lags the commanded ratio. NaN where n_in == 0.
    """
    return _out(1.0 - _f(ratio_cmd) * _div(n_out_rpm, n_in_rpm))


def ratio_from_slip(ratio_cmd: Any, s: Any) -> Any:
    """Actual ratio that a slip ``s`` at commanded ratio ``ratio_cmd`` implies.

    i_act = i_cmd / (1 - s), the inverse of ``slip`` (dimensionless); NaN where s == 1
    (output standing still).
    """
    return _out(_div(ratio_cmd, 1.0 - _f(s)))


def series_slip(*slips: Any) -> Any:
    """Total slip of contacts in series: 1 - prod(1 - s_k) (dimensionless, domain.md 1.3).

    With no argument the total slip is 0.
    """
    acc = np.float64(1.0)
    for s in slips:
        acc = acc * (1.0 - _f(s))
    return _out(1.0 - acc)


def mech_power_w(torque_nm: Any, n_rpm: Any) -> Any:
    """Shaft power in W from torque in N*m and speed in rpm (P = T*omega, domain.md 1.2)."""
    return _out(_f(torque_nm) * _f(n_rpm) * _TWO_PI_OVER_60)


def output_torque_nm(t_in_nm: Any, i_kin: Any, eta_t: Any = 1.0) -> Any:
    """Output torque in N*m: T_out = T_in * i_kin * eta_T (domain.md 1.2).

    ``eta_t = 1`` gives the ideal (loss-free) torque multiplication.
    """
    return _out(_f(t_in_nm) * _f(i_kin) * _f(eta_t))


def efficiency(t_out_nm: Any, n_out_rpm: Any, p_in_w: Any) -> Any:
    """Overall efficiency eta = T_out * omega_out / P_in (dimensionless, domain.md 1.2).

    ``p_in_w`` is the input power in W (electrical or shaft, as the caller defines the
    boundary). NaN where p_in_w == 0.
    """
    return _out(_div(_f(t_out_nm) * _f(n_out_rpm) * _TWO_PI_OVER_60, p_in_w))


def torque_efficiency(t_in_nm: Any, t_out_nm: Any, i_kin: Any) -> Any:
    """Torque efficiency eta_T = T_out / (T_in * i_kin) (dimensionless, domain.md 1.2).

    Overall efficiency of a slipping drive is (1 - s) * eta_T. NaN where T_in*i_kin == 0.
    """
    return _out(_div(t_out_nm, _f(t_in_nm) * _f(i_kin)))


# ---------------------------------------------------------------- DC motor (domain.md 1.4)
def back_emf_v(v: Any, i: Any, r_ohm: Any) -> Any:
    """Back-EMF in V: E = V - I*R (terminal voltage V in V, current I in A, R in ohm)."""
    return _out(_f(v) - _f(i) * _f(r_ohm))


def motor_constant(v: Any, i: Any, r_ohm: Any, omega_rad_s: Any) -> Any:
    """Motor constant k = (V - I*R) / omega in V*s/rad (= N*m/A in SI).

    NaN where omega == 0 (standing still: k cannot be seen).
    """
    return _out(_div(_f(v) - _f(i) * _f(r_ohm), omega_rad_s))


def em_torque_nm(k: Any, i: Any) -> Any:
    """Electromagnetic torque in N*m: T_em = k * I (k in N*m/A, I in A)."""
    return _out(_f(k) * _f(i))


def shaft_torque_nm(k: Any, i: Any, i0_a: Any) -> Any:
    """Shaft torque in N*m: T_shaft = k * (I - I_0), I_0 the no-load current in A."""
    return _out(_f(k) * (_f(i) - _f(i0_a)))


def shaft_power_w(k: Any, i: Any, i0_a: Any, omega_rad_s: Any) -> Any:
    """Shaft power in W: P_shaft = k * (I - I_0) * omega (omega in rad/s)."""
    return _out(_f(k) * (_f(i) - _f(i0_a)) * _f(omega_rad_s))


def motor_efficiency(v: Any, i: Any, k: Any, i0_a: Any, omega_rad_s: Any) -> Any:
    """Motor efficiency P_shaft / (V*I) (dimensionless). NaN where V*I == 0."""
    return _out(_div(shaft_power_w(k, i, i0_a, omega_rad_s), _f(v) * _f(i)))


def locked_rotor_current_a(v: Any, r_ohm: Any) -> Any:
    """Starting (locked-rotor) current in A: I = V / R, back-EMF zero. NaN where R == 0."""
    return _out(_div(v, r_ohm))


def armature_current_a(v: Any, omega_rad_s: Any, r_ohm: Any, k: Any) -> Any:
    """Armature current in A from V = I*R + k*omega: I = (V - k*omega) / R. NaN where R == 0."""
    return _out(_div(_f(v) - _f(k) * _f(omega_rad_s), r_ohm))


def motor_voltage_v(i: Any, omega_rad_s: Any, r_ohm: Any, k: Any) -> Any:
    """Terminal voltage in V: V = I*R + k*omega (no brush drop)."""
    return _out(_f(i) * _f(r_ohm) + _f(k) * _f(omega_rad_s))


def fit_motor_constants(v: Any, i: Any, omega_rad_s: Any) -> tuple[float, float, float, int]:
    """Least-squares fit of v = R*i + k_e*omega (no intercept) over the usable rows.

    Inputs: terminal voltage in V, current in A, angular speed in rad/s (same shape).
    Rows with a NaN or inf in any input are ignored.

    Returns ``(r_ohm, k_e, resid_std_v, n)``: R in ohm, k_e in V*s/rad, the residual
    standard deviation in V (n - 2 degrees of freedom; 0 for an exact fit) and the number
    of rows used. The three floats are NaN when fewer than 3 rows are usable or when
    i and omega are collinear (for example all at one operating point). Never raises.
    """
    v_, i_, w_ = np.broadcast_arrays(_f(v), _f(i), _f(omega_rad_s))
    v_, i_, w_ = v_.ravel(), i_.ravel(), w_.ravel()
    ok = np.isfinite(v_) & np.isfinite(i_) & np.isfinite(w_)
    n = int(ok.sum())
    nan = float("nan")
    if n < 3:
        return nan, nan, nan, n
    a = np.column_stack([i_[ok], w_[ok]])
    b = v_[ok]
    # Scale the columns so the rank test does not depend on units (A vs rad/s).
    scale = np.sqrt((a * a).sum(axis=0))
    if not np.all(scale > 0):
        return nan, nan, nan, n
    sol, _, rank, sv = np.linalg.lstsq(a / scale, b, rcond=None)
    if rank < 2 or sv[-1] <= 1e-9 * sv[0]:
        return nan, nan, nan, n
    r_ohm, k_e = sol / scale
    resid = b - a @ np.array([r_ohm, k_e])
    resid_std = float(np.sqrt((resid * resid).sum() / (n - 2)))
    return float(r_ohm), float(k_e), resid_std, n


def winding_resistance(r_ref_ohm: Any, temp_c: Any, temp_ref_c: Any = 20.0,
                       alpha: Any = ALPHA_COPPER_PER_K) -> Any:
    """Winding resistance in ohm at ``temp_c`` (degC): R = R_ref * (1 + alpha*(T - T_ref)).

    ``alpha`` in 1/K; the default is annealed copper at 20 degC (domain.md 1.4, from memory).
    """
    return _out(_f(r_ref_ohm) * (1.0 + _f(alpha) * (_f(temp_c) - _f(temp_ref_c))))


def resistance_at_reference(r_ohm: Any, temp_c: Any, temp_ref_c: Any = 20.0,
                            alpha: Any = ALPHA_COPPER_PER_K) -> Any:
    """Resistance in ohm referred back to ``temp_ref_c`` (inverse of ``winding_resistance``).

    NaN where 1 + alpha*(T - T_ref) == 0.
    """
    return _out(_div(r_ohm, 1.0 + _f(alpha) * (_f(temp_c) - _f(temp_ref_c))))


# ---------------------------------------------------------------- cone-and-wheel geometry
def cone_radii(x: Any, r_small: Any, r_large: Any, length: Any) -> tuple[Any, Any]:
    """Contact radii ``(r_in, r_out)`` of a wheel at axial position ``x`` between two cones.

    The input cone grows from ``r_small`` at x = 0 to ``r_large`` at x = length; the output
    cone is its mirror: r_in = r_small + (r_large - r_small)*x/length,
    r_out = r_large - (r_large - r_small)*x/length. All lengths in one unit (m in fleetwatch).
    NaN outside 0 <= x <= length or where length <= 0.
    """
    x_, rs, rl, ln = (_f(a) for a in (x, r_small, r_large, length))
    with np.errstate(divide="ignore", invalid="ignore"):
        u = np.where(ln > 0, x_ / ln, np.nan)
    u = np.where((u >= 0.0) & (u <= 1.0), u, np.nan)
    d = rl - rs
    return _out(rs + d * u), _out(rl - d * u)


def cone_ratio(x: Any, r_small: Any, r_large: Any, length: Any) -> Any:
    """Kinematic (no-slip) ratio i_kin = r_out(x) / r_in(x) of the cone-and-wheel variator.

    The wheel radius cancels (domain.md 1.1: equal surface speed at both contacts).
    Dimensionless; NaN where x is off the cones or r_in == 0.
    """
    r_in, r_out = cone_radii(x, r_small, r_large, length)
    return _out(_div(r_out, r_in))


def cone_position(ratio: Any, r_small: Any, r_large: Any, length: Any) -> Any:
    """Wheel position x (length unit of the inputs) that gives kinematic ratio ``ratio``.

    Inverse of ``cone_ratio``: x = length * (r_large - i*r_small) / ((r_large - r_small)*(i+1)).
    NaN where the ratio is outside [r_small/r_large, r_large/r_small] or the cones are
    cylinders (r_large == r_small).
    """
    i_, rs, rl, ln = (_f(a) for a in (ratio, r_small, r_large, length))
    u = _div(rl - i_ * rs, (rl - rs) * (i_ + 1.0))
    tol = 1e-12
    u = np.where((u >= -tol) & (u <= 1.0 + tol), np.clip(u, 0.0, 1.0), np.nan)
    return _out(np.where(ln > 0, u * ln, np.nan))


def spin_edge_mismatch(width: Any, radius: Any) -> Any:
    """Fractional surface-speed mismatch +/- w/(2R) across a wheel of width w at radius R.

    Dimensionless (domain.md 2.4, derived from Orthwein: w 10 mm at R 50 mm gives 0.10).
    NaN where R == 0.
    """
    return _out(_div(width, 2.0 * _f(radius)))


# ---------------------------------------------------------------- traction curve
# Shape used by the simulator (documented choice, domain.md 2.1 gives only the qualitative
# shape: linear at small slip, a maximum mu_max, falling in gross slip):
#     mu(s) = mu_max * 2*s*s_p / (s**2 + s_p**2)
# It starts linearly with slope 2*mu_max/s_p, peaks at exactly mu_max when s = s_p and falls
# beyond the peak (gross slip). It is odd in s. On the stable branch |s| <= s_p its inverse
# has a closed form (with mu/mu_max = sin(theta), s/s_p = tan(theta/2)).
def traction_coefficient(slip: Any, mu_max: Any, slip_at_peak: Any) -> Any:
    """Traction coefficient mu_t = F_tangential / F_normal at contact slip ``slip``.

    mu = mu_max * 2*s*s_p / (s^2 + s_p^2) with s_p = ``slip_at_peak`` (dimensionless).
    NaN where slip_at_peak <= 0.
    """
    s_, mu, sp = _f(slip), _f(mu_max), _f(slip_at_peak)
    with np.errstate(divide="ignore", invalid="ignore"):
        val = mu * 2.0 * s_ * sp / (s_ * s_ + sp * sp)
    return _out(np.where(sp > 0, val, np.nan))


def slip_for_traction(mu_required: Any, mu_max: Any, slip_at_peak: Any) -> Any:
    """Contact slip needed to transmit traction ``mu_required`` (inverse of the curve).

    Stable branch: s = s_p * r / (1 + sqrt(1 - r^2)), r = mu_required / mu_max.
    Returns +inf (or -inf for negative traction) when |mu_required| >= mu_max: the contact
    cannot carry the load and slides (gross slip). NaN where mu_max <= 0 or s_p <= 0.
    """
    m, mu, sp = _f(mu_required), _f(mu_max), _f(slip_at_peak)
    with np.errstate(divide="ignore", invalid="ignore"):
        r = m / mu
        inside = np.abs(r) < 1.0
        rr = np.where(inside, r, 0.0)
        s_ = sp * rr / (1.0 + np.sqrt(1.0 - rr * rr))
    out = np.where(inside, s_, np.copysign(np.inf, m))
    out = np.where((mu > 0) & (sp > 0) & np.isfinite(m), out, np.nan)
    return _out(out)


# ---------------------------------------------------------------- induction motor (1.5)
def synchronous_speed_rpm(f_hz: Any, poles: Any) -> Any:
    """Synchronous speed in rpm: n_s = 120 * f / p (f in Hz, p poles). NaN where p == 0."""
    return _out(_div(120.0 * _f(f_hz), poles))


def induction_slip(n_sync_rpm: Any, n_rpm: Any) -> Any:
    """Electrical slip of an induction motor (n_s - n) / n_s (dimensionless). NaN at n_s == 0.

    Not the same quantity as the variator's mechanical slip (domain.md 1.5).
    """
    return _out(_div(_f(n_sync_rpm) - _f(n_rpm), n_sync_rpm))


def rotor_frequency_hz(s: Any, f_hz: Any) -> Any:
    """Rotor current frequency in Hz: f_r = s * f."""
    return _out(_f(s) * _f(f_hz))
